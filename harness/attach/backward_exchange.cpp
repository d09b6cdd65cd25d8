// headroom — the exchange folder of one backward call of an external program (external_program.h).
//
// The forward's folder (exchange_problem) plus O, lse and dO as inputs;
// problem.json says "pass": "backward" and lists the gradients as outputs.
// Read back as strictly as the forward's o.npy: a gradient file missing,
// mistyped, mis-shaped or malformed is bad_output naming it.
#include <stdexcept>
#include <string>

#include "attach/exchange_files.h"
#include "attach/packing.h"
#include "headroom/external_program.h"
#include "headroom/format.h"
#include "headroom/kernel_abi.h"

namespace headroom {
namespace {

using nlohmann::json;

// `t` with every value rounded to `f` (NaN and infinities kept).
Tensor rounded(const Tensor& t, Format f) {
  Tensor r = t;
  for (double& x : r.values) x = round_to_format(x, f);
  return r;
}

bool writes_bias_grad(const ReceivedCase& c, const KernelDeclaration& d) {
  return (d.backward_flags & HR_BACKWARD_BIAS_GRAD) != 0 && c.received.core.mask.kind == MaskKind::bias;
}

}  // namespace

void write_backward_exchange(const std::filesystem::path& dir, const ReceivedCase& c, const KernelDeclaration& d,
                             const Tensor& o, const Tensor& lse) {
  attach_detail::check_received(c, d);
  const auto fail = [&](const std::string& why) {
    throw std::invalid_argument("backward of program \"" + d.name + "\" on case \"" + c.received.name + "\": " + why);
  };
  if (!d.backward) fail("the program declares no backward");
  if (c.received.level != Level::core) fail("backward calls are core level");
  const CoreShape& s = c.received.core.shape;
  const std::vector<std::int64_t> o_shape{s.batch, s.q_heads, s.q_len, s.value_dim};
  const std::vector<std::int64_t> lse_shape{s.batch, s.q_heads, s.q_len};
  if (c.received.d_o.shape != o_shape) fail("the case carries no dO of shape [B, Hq, Tq, Dv]");
  if (o.shape != o_shape) fail("O is not shaped [B, Hq, Tq, Dv]");
  if (lse.shape != lse_shape) fail("lse is not shaped [B, Hq, Tq]");

  json problem = attach_detail::exchange_problem(dir, c, d);
  problem["pass"] = "backward";
  problem.erase("returns_lse");
  attach_detail::put(dir, "o.npy", tensor_to_npy(rounded(o, d.output_format), d.output_format));
  attach_detail::put(dir, "lse.npy", tensor_to_npy(rounded(lse, Format::float32), Format::float32));
  attach_detail::put(dir, "d_o.npy", tensor_to_npy(c.received.d_o, d.input_format));
  problem["inputs"]["o"] = "o.npy";
  problem["inputs"]["lse"] = "lse.npy";
  problem["inputs"]["d_o"] = "d_o.npy";
  const std::string out(npy_descr_of(d.output_format));
  json outputs = {
      {"d_q", {{"file", "d_q.npy"}, {"dtype", out}, {"shape", {s.batch, s.q_heads, s.q_len, s.key_dim}}}},
      {"d_k", {{"file", "d_k.npy"}, {"dtype", out}, {"shape", {s.batch, s.kv_heads, s.kv_len, s.key_dim}}}},
      {"d_v", {{"file", "d_v.npy"}, {"dtype", out}, {"shape", {s.batch, s.kv_heads, s.kv_len, s.value_dim}}}}};
  if (writes_bias_grad(c, d))
    outputs["d_bias"] = {{"file", "d_bias.npy"}, {"dtype", "<f4"}, {"shape", c.received.core.mask.bias.shape}};
  problem["outputs"] = outputs;
  attach_detail::write_problem(dir, problem);
}

BackwardRun read_backward_exchange(const std::filesystem::path& dir, const ReceivedCase& c, const KernelDeclaration& d) {
  const CoreShape& s = c.received.core.shape;
  const std::string descr(npy_descr_of(d.output_format));
  struct Wanted {
    const char* file;
    std::string descr;
    std::vector<std::int64_t> shape;
    const char* meaning;
    Tensor BackwardRun::*into;
  };
  std::vector<Wanted> wanted = {
      {"d_q.npy", descr, {s.batch, s.q_heads, s.q_len, s.key_dim}, "the gradient of Q", &BackwardRun::d_q},
      {"d_k.npy", descr, {s.batch, s.kv_heads, s.kv_len, s.key_dim}, "the gradient of K", &BackwardRun::d_k},
      {"d_v.npy", descr, {s.batch, s.kv_heads, s.kv_len, s.value_dim}, "the gradient of V", &BackwardRun::d_v}};
  if (writes_bias_grad(c, d))
    wanted.push_back({"d_bias.npy", "<f4", c.received.core.mask.bias.shape,
                      "the gradient of the bias it declares (bias_grad)", &BackwardRun::d_bias});
  BackwardRun r;
  for (const Wanted& w : wanted) {
    std::string bad;
    std::optional<Tensor> t = attach_detail::read_output(dir, w.file, w.descr, w.shape, w.meaning, bad);
    if (!t) {
      BackwardRun failed;
      failed.status = RunStatus::bad_output;
      failed.detail = bad;
      return failed;
    }
    r.*w.into = std::move(*t);
  }
  return r;
}

}  // namespace headroom
