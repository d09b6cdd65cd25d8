// headroom — running a kernel that is an external program, through .npy files (external_program.h).
#include "headroom/external_program.h"

#include <cerrno>
#include <cmath>
#include <cstdio>
#include <cstring>
#include <fstream>
#include <system_error>

#include <nlohmann/json.hpp>

#include "attach/exchange_files.h"
#include "attach/exchange_folder.h"
#include "attach/isolation.h"
#include "attach/packing.h"
#include "attach/process.h"
#include "attach/served_program.h"
#include "headroom/input_error.h"
#include "headroom/npy.h"
#include "headroom/varlen.h"

namespace headroom {

namespace attach_detail {

namespace fs = std::filesystem;
using nlohmann::json;

// Plain writes, not write_npy's flushed atomic rename: the folder is private,
// short-lived and read only after this process has closed every file, so
// durability would cost an fsync per tensor for nothing.
void put(const fs::path& dir, const std::string& file, const NpyArray& a) {
  const std::vector<unsigned char> bytes = npy_file_bytes(a);
  std::ofstream f(dir / file, std::ios::binary);
  f.write(reinterpret_cast<const char*>(bytes.data()), static_cast<std::streamsize>(bytes.size()));
  f.close();
  if (!f) throw std::runtime_error("cannot write " + (dir / file).string());
}

std::optional<Tensor> read_output(const fs::path& dir, const std::string& file, const std::string& descr,
                                  const std::vector<std::int64_t>& shape, const char* meaning, std::string& bad) {
  const fs::path path = dir / file;
  std::error_code ec;
  if (!fs::exists(path, ec)) {
    bad = file + ": not written (the program must write " + meaning + ")";
    return std::nullopt;
  }
  try {
    NpyArray a = read_npy(path);
    if (a.descr != descr) {
      bad = file + ": dtype '" + a.descr + "', expected '" + descr + "'";
      return std::nullopt;
    }
    if (a.shape != shape) {
      bad = file + ": shape " + json(a.shape).dump() + ", expected " + json(shape).dump();
      return std::nullopt;
    }
    return npy_to_tensor(a, path);
  } catch (const InputError& e) {
    bad = file + ": " + e.place() + ": " + e.problem();
    return std::nullopt;
  }
}

void write_problem(const fs::path& dir, const json& problem) {
  std::ofstream f(dir / "problem.json");
  f << problem.dump(2) << '\n';
  if (!f) throw std::runtime_error("cannot write " + (dir / "problem.json").string());
}

}  // namespace attach_detail

namespace {

using attach_detail::put;
using attach_detail::read_output;

namespace fs = std::filesystem;
using nlohmann::json;

NpyArray raw_array(std::vector<std::int64_t> shape, const char* descr, const void* data, std::size_t bytes) {
  NpyArray a;
  a.shape = std::move(shape);
  a.descr = descr;
  a.bytes.resize(bytes);
  if (bytes != 0) std::memcpy(a.bytes.data(), data, bytes);
  return a;
}

void put_quantised(const fs::path& dir, const std::string& name, const QuantizedTensor& q, json& quant) {
  // int8 codes as signed bytes; 8-bit float codes as their unsigned patterns.
  put(dir, name + ".npy", raw_array(q.shape, q.format == Format::int8 ? "|i1" : "|u1", q.codes.data(), q.codes.size()));
  put(dir, name + "_scale.npy", raw_array(q.scale_shape, "<f4", q.scales.data(), q.scales.size() * sizeof(float)));
  json entry = {{"granularity", std::string(granularity_name(q.scheme.granularity))},
                {"asymmetric", q.scheme.asymmetric},
                {"scale", name + "_scale.npy"}};
  if (q.scheme.granularity == Granularity::per_block) entry["block"] = q.scheme.block;
  if (q.scheme.asymmetric) {
    put(dir, name + "_zero_point.npy",
        raw_array(q.scale_shape, "<i4", q.zero_points.data(), q.zero_points.size() * sizeof(std::int32_t)));
    entry["zero_point"] = name + "_zero_point.npy";
  }
  quant[name] = entry;
}

json put_mask(const fs::path& dir, const Mask& m) {
  json j = {{"kind", std::string(mask_kind_name(m.kind))}};
  if (m.kind == MaskKind::key_padding) {
    put(dir, "key_lengths.npy",
        raw_array({static_cast<std::int64_t>(m.key_lengths.size())}, "<i8", m.key_lengths.data(),
                  m.key_lengths.size() * sizeof(std::int64_t)));
    j["file"] = "key_lengths.npy";
  } else if (m.kind == MaskKind::dense) {
    put(dir, "mask.npy", tensor_to_npy(m.allowed, "|b1"));
    j["file"] = "mask.npy";
  } else if (m.kind == MaskKind::bias) {
    put(dir, "bias.npy", tensor_to_npy(m.bias, "<f4"));
    j["file"] = "bias.npy";
  }
  // Protocol 2: only a program that declared the "window" feature gets one.
  if (m.has_window()) j["window"] = {{"left", m.window_left}, {"right", m.window_right}};
  return j;
}

std::string float_hex(float x) {
  char buf[48];
  std::snprintf(buf, sizeof buf, "%a", static_cast<double>(x));
  return buf;
}

double float_decimal(float x) {
  // 9 significant digits identify a float32 (IEEE 754-2019 §5.12.2); the
  // double nearest that decimal rounds back to x.
  char buf[48];
  std::snprintf(buf, sizeof buf, "%.9g", static_cast<double>(x));
  return std::strtod(buf, nullptr);
}

class ProgramKernel final : public AttachedKernel {
 public:
  ProgramKernel(std::string command, KernelDeclaration d) : command_(std::move(command)), declaration_(std::move(d)) {}
  const KernelDeclaration& declaration() const override { return declaration_; }

  KernelRun run(const ReceivedCase& c, const RunOptions& opt) override {
    attach_detail::check_received(c, declaration_);
    attach_detail::ExchangeFolder dir;
    write_exchange(dir.path(), c, declaration_);
    KernelRun r;
    if (!call("run", dir.path(), opt, r.status, r.detail)) return r;
    return read_exchange(dir.path(), c, declaration_);
  }

  BackwardRun run_backward(const ReceivedCase& c, const Tensor& o, const Tensor& lse, const RunOptions& opt) override {
    attach_detail::ExchangeFolder dir;
    write_backward_exchange(dir.path(), c, declaration_, o, lse);  // checks the preconditions
    BackwardRun r;
    if (!call("run-backward", dir.path(), opt, r.status, r.detail)) return r;
    return read_backward_exchange(dir.path(), c, declaration_);
  }

 private:
  // Runs `CMD verb DIR` under the time limit. Returns: true when the program
  // exited 0 (read its files); else false with the status and detail set.
  bool call(const char* verb, const fs::path& dir, const RunOptions& opt, RunStatus& status, std::string& detail) {
    const std::string line = command_ + " " + verb + " " + attach_detail::shell_quote(dir.string());
    // No address-space limit here: GPU runtimes and sanitizer builds reserve
    // terabytes of address space they never touch, and the program's memory
    // cannot corrupt headroom's. The time limit still applies.
    attach_detail::ProcessResult p = attach_detail::run_shell(line, opt.time_limit_s, 0);
    if (p.timed_out) {
      status = RunStatus::timeout;
      detail = "`" + command_ + " " + verb + "`: " + attach_detail::describe_end(p, opt.time_limit_s);
      return false;
    }
    if (!p.started || p.signaled || (p.exit_code != 0 && p.exit_code != kExternalExitUnsupported)) {
      status = RunStatus::crash;
      detail = "`" + command_ + " " + verb + "`: " + attach_detail::describe_end(p, opt.time_limit_s);
      return false;
    }
    if (p.exit_code == kExternalExitUnsupported) {
      status = RunStatus::unsupported;
      detail = "the program exited " + std::to_string(kExternalExitUnsupported) + " (declines the problem)";
      return false;
    }
    // As for an isolated plug-in call: what it left running is the fault, whatever its files.
    if (p.strays > 0) {
      status = RunStatus::stray_process;
      detail = "`" + command_ + " " + verb + "`: " + attach_detail::strays_text(p.strays, p.stray_name);
      return false;
    }
    return true;
  }

  std::string command_;
  KernelDeclaration declaration_;
};

}  // namespace

json attach_detail::exchange_problem(const fs::path& dir, const ReceivedCase& c, const KernelDeclaration& d) {
  const Case& k = c.received;
  json problem = {{"protocol", d.interface_version},
                  {"kernel", d.name},
                  {"case", k.name},
                  {"level", k.level == Level::core ? "core" : "block"},
                  {"input_format", std::string(format_name(d.input_format))},
                  {"output_format", std::string(format_name(d.output_format))},
                  {"layout", "BHTD"}};
  json inputs = json::object();
  const std::string out_descr(npy_descr_of(d.output_format));
  if (k.level == Level::core) {
    const CoreShape& s = k.core.shape;
    problem["shape"] = {{"batch", s.batch},     {"q_heads", s.q_heads}, {"kv_heads", s.kv_heads}, {"q_len", s.q_len},
                        {"kv_len", s.kv_len},   {"key_dim", s.key_dim}, {"value_dim", s.value_dim}};
    problem["scale"] = float_decimal(k.core.scale);
    problem["scale_hex"] = float_hex(k.core.scale);
    problem["mask"] = put_mask(dir, k.core.mask);
    // Protocol 2: only a program that declared "softcap" / "sinks" gets them.
    if (k.core.has_softcap()) {
      problem["softcap"] = float_decimal(k.core.softcap);
      problem["softcap_hex"] = float_hex(k.core.softcap);
    }
    if (k.core.has_sinks()) {
      put(dir, "sinks.npy", raw_array({static_cast<std::int64_t>(k.core.sinks.size())}, "<f4", k.core.sinks.data(),
                                      k.core.sinks.size() * sizeof(float)));
      problem["sinks"] = "sinks.npy";
    }
    // Protocol 2, a program that declared "varlen": "shape" keeps the packed
    // tensors' extents (batch 1, Tq and Tk the totals), "varlen" the rest (docs/varlen.md).
    if (k.core.mask.is_varlen()) {
      const Mask& m = k.core.mask;
      const CoreShape told = declared_shape(s, m);
      put(dir, "cu_q_lens.npy", raw_array({static_cast<std::int64_t>(m.cu_q_lens.size())}, "<i8", m.cu_q_lens.data(),
                                          m.cu_q_lens.size() * sizeof(std::int64_t)));
      put(dir, "cu_kv_lens.npy", raw_array({static_cast<std::int64_t>(m.cu_kv_lens.size())}, "<i8", m.cu_kv_lens.data(),
                                           m.cu_kv_lens.size() * sizeof(std::int64_t)));
      problem["varlen"] = {{"sequences", told.batch},         {"max_q_len", told.q_len}, {"max_kv_len", told.kv_len},
                           {"cu_q_lens", "cu_q_lens.npy"}, {"cu_kv_lens", "cu_kv_lens.npy"}};
    }
    if (is_quantised(d.input_format)) {
      json quant = json::object();
      put_quantised(dir, "q", *c.q8, quant);
      put_quantised(dir, "k", *c.k8, quant);
      put_quantised(dir, "v", *c.v8, quant);
      problem["quant"] = quant;
    } else {
      put(dir, "q.npy", tensor_to_npy(k.core_inputs.q, d.input_format));
      put(dir, "k.npy", tensor_to_npy(k.core_inputs.k, d.input_format));
      put(dir, "v.npy", tensor_to_npy(k.core_inputs.v, d.input_format));
    }
    inputs = {{"q", "q.npy"}, {"k", "k.npy"}, {"v", "v.npy"}};
    json outputs = {{"o", {{"file", "o.npy"}, {"dtype", out_descr}, {"shape", {s.batch, s.q_heads, s.q_len, s.value_dim}}}}};
    problem["returns_lse"] = d.returns_lse;
    if (d.returns_lse) outputs["lse"] = {{"file", "lse.npy"}, {"dtype", "<f4"}, {"shape", {s.batch, s.q_heads, s.q_len}}};
    problem["outputs"] = outputs;
  } else {
    const BlockShape& s = k.block.shape;
    problem["shape"] = {{"batch", s.batch},       {"q_len", s.q_len},       {"kv_len", s.kv_len},
                        {"model_dim", s.model_dim}, {"q_heads", s.q_heads}, {"kv_heads", s.kv_heads},
                        {"key_dim", s.key_dim},   {"value_dim", s.value_dim}};
    problem["scale"] = float_decimal(k.block.scale);
    problem["scale_hex"] = float_hex(k.block.scale);
    problem["mask"] = put_mask(dir, k.block.mask);
    const BlockInputs& in = k.block_inputs;
    const std::pair<const char*, const Tensor*> tensors[] = {
        {"x_q", &in.x_q}, {"x_kv", &in.x_kv}, {"w_q", &in.w_q}, {"w_k", &in.w_k}, {"w_v", &in.w_v},
        {"w_o", &in.w_o}, {"b_q", &in.b_q},   {"b_k", &in.b_k}, {"b_v", &in.b_v}, {"b_o", &in.b_o}};
    for (const auto& [name, t] : tensors) {
      if (t->values.empty()) continue;  // an absent bias has no file
      put(dir, std::string(name) + ".npy", tensor_to_npy(*t, d.input_format));
      inputs[name] = std::string(name) + ".npy";
    }
    problem["outputs"] = {{"y", {{"file", "y.npy"}, {"dtype", out_descr}, {"shape", {s.batch, s.q_len, s.model_dim}}}}};
  }
  problem["inputs"] = inputs;
  return problem;
}

void write_exchange(const fs::path& dir, const ReceivedCase& c, const KernelDeclaration& d) {
  attach_detail::write_problem(dir, attach_detail::exchange_problem(dir, c, d));
}

KernelRun read_exchange(const fs::path& dir, const ReceivedCase& c, const KernelDeclaration& d) {
  KernelRun r;
  const std::string descr(npy_descr_of(d.output_format));
  std::string bad;
  std::optional<Tensor> out;
  if (c.received.level == Level::core) {
    const CoreShape& s = c.received.core.shape;
    out = read_output(dir, "o.npy", descr, {s.batch, s.q_heads, s.q_len, s.value_dim}, "the attention output", bad);
    if (out && d.returns_lse) {
      std::optional<Tensor> lse = read_output(dir, "lse.npy", "<f4", {s.batch, s.q_heads, s.q_len},
                                              "the log-sum-exp it declares (returns_lse)", bad);
      if (lse) r.lse = std::move(*lse);
      if (!lse) out.reset();
    }
  } else {
    const BlockShape& s = c.received.block.shape;
    out = read_output(dir, "y.npy", descr, {s.batch, s.q_len, s.model_dim}, "the block output", bad);
  }
  if (!out) {
    r.status = RunStatus::bad_output;
    r.detail = bad;
    r.lse = Tensor{};
    return r;
  }
  r.out = std::move(*out);
  return r;
}

std::unique_ptr<AttachedKernel> attach_program(const std::string& command, double time_limit_s) {
  const std::string origin = "`" + command + "`";
  attach_detail::ProcessResult p = attach_detail::run_shell(command + " describe", time_limit_s, 0);
  if (!p.started || p.timed_out || p.signaled || p.exit_code != 0) {
    throw InputError(origin, "describe", "`" + command + " describe` failed: " + attach_detail::describe_end(p, time_limit_s),
                     "check the command line; `CMD describe` must print the declaration as JSON and exit 0 "
                     "(docs/external-program.md)");
  }
  if (p.out_truncated) {
    throw InputError(origin, "describe", "printed more than 1 MiB", "print only the declaration on stdout");
  }
  int serve = 0;
  KernelDeclaration d = declaration_from_json(p.out, origin, &serve);
  if (serve != 0) return attach_detail::attach_served_program(command, std::move(d));
  return std::make_unique<ProgramKernel>(command, std::move(d));
}

}  // namespace headroom
