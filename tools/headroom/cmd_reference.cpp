// headroom reference — the certified reference of one case, written as .npy files.
//
//   headroom reference --case DIR --out DIR [--threads N] [--target-log2 E]
//                      [--method fast|multiprecision] [--backend mpfr|cpp_bin_float]
//
// Writes into the output folder (created if missing), all float64 '<f8':
//   out.npy        o_ref rounded to double   core [B, Hq, Tq, Dv], block [B, Tq, Dm]
//   bound.npy      certified |o_ref − o_exact|          (same shape)
//   magnitude.npy  the scaled-error unit (reference.h)  (same shape)
//   lse.npy        core only: log-sum-exp [B, Hq, Tq]
//   lse_bound.npy  core only: its certified bound
// NaN marks fully masked rows. Prints one line: case, elements, the worst
// bound relative to magnitude (log2), certified yes/no. Exit 0 when certified,
// 1 when some element could not be certified within the target, 2 on bad
// usage or bad input.
#include <algorithm>
#include <cmath>
#include <cstdio>
#include <filesystem>
#include <memory>
#include <string>
#include <system_error>

#include "command.h"
#include "usage_error.h"
#include "headroom/case_folder.h"
#include "headroom/input_error.h"
#include "headroom/npy.h"
#include "headroom/reference.h"

namespace headroom::cli {
namespace {

struct ReferenceArgs {
  std::string case_dir, out_dir, backend = "mpfr", method = "fast";
  unsigned threads = 1;
  int target_log2 = -80;
};

void write_f8(const std::filesystem::path& dir, const char* name, const Tensor& t) {
  write_npy(dir / name, tensor_to_npy(t, "<f8"));
}

// The worst bound/magnitude over finite elements (0 when all are exact).
double worst_ratio(const Tensor& bound, const Tensor& magnitude) {
  double worst = 0;
  for (std::size_t i = 0; i < bound.values.size(); ++i) {
    const double b = bound.values[i], m = magnitude.values[i];
    if (std::isnan(b)) continue;
    worst = std::max(worst, m > 0 ? b / m : (b > 0 ? INFINITY : 0.0));
  }
  return worst;
}

int reference_main(const ReferenceArgs& a) {
  ReferenceOptions opt;
  opt.threads = a.threads;
  opt.target_log2 = a.target_log2;
  if (a.backend == "mpfr") {
    opt.backend = ReferenceBackend::mpfr;
  } else if (a.backend == "cpp_bin_float") {
    opt.backend = ReferenceBackend::cpp_bin_float;
  } else {
    throw InputError("--backend", "value \"" + a.backend + "\"", "unknown backend", "use mpfr or cpp_bin_float");
  }
  if (a.method == "fast") {
    opt.method = ReferenceMethod::fast;
  } else if (a.method == "multiprecision") {
    opt.method = ReferenceMethod::multiprecision;
  } else {
    throw InputError("--method", "value \"" + a.method + "\"", "unknown method", "use fast or multiprecision");
  }
  const Case c = read_case(a.case_dir);
  const std::filesystem::path out(a.out_dir);
  std::error_code ec;
  std::filesystem::create_directories(out, ec);
  if (ec) throw InputError(a.out_dir, "folder", "cannot create the output folder: " + ec.message(), "pass a writable --out");

  bool certified = false;
  double worst = 0;
  std::int64_t elements = 0;
  if (c.level == Level::core) {
    const CoreReference r = reference_core(c.core, c.core_inputs, opt);
    write_f8(out, "out.npy", r.out);
    write_f8(out, "bound.npy", r.bound);
    write_f8(out, "magnitude.npy", r.magnitude);
    write_f8(out, "lse.npy", r.lse);
    write_f8(out, "lse_bound.npy", r.lse_bound);
    certified = r.certified;
    worst = worst_ratio(r.bound, r.magnitude);
    elements = r.out.size();
  } else {
    const BlockReference r = reference_block(c.block, c.block_inputs, opt);
    write_f8(out, "out.npy", r.out);
    write_f8(out, "bound.npy", r.bound);
    write_f8(out, "magnitude.npy", r.magnitude);
    certified = r.certified;
    worst = worst_ratio(r.bound, r.magnitude);
    elements = r.out.size();
  }
  const std::string worst_text = worst > 0 ? "2^" + std::to_string(static_cast<int>(std::floor(std::log2(worst)))) : "0";
  std::printf("reference %s: %s, %lld elements, worst bound/magnitude %s (target 2^%d), certified %s\n",
              c.name.c_str(), c.level == Level::core ? "core" : "block", static_cast<long long>(elements),
              worst_text.c_str(), a.target_log2, certified ? "yes" : "no");
  return certified ? 0 : 1;
}

const CommandRegistration reg{"reference", 40, [](CLI::App& app) {
  auto* cmd = app.add_subcommand("reference", "Compute the certified reference of a case into .npy files");
  auto args = std::make_shared<ReferenceArgs>();
  cmd->add_option("--case", args->case_dir, "case folder (manifest.json and .npy tensors)")->required();
  cmd->add_option("--out", args->out_dir, "output folder for out.npy, bound.npy, magnitude.npy, lse*.npy")->required();
  cmd->add_option("--threads", args->threads, "worker threads (0: one per hardware thread; at most 1024); results do not depend on it")
      ->check(integer_in("--threads", 0, kMaxThreads, "2", "0 uses one thread per core"));
  // -53: a weaker target claims less than the float64 values written already
  // carry. -1000: bounds bottom out near 2^-1068 relative (the subnormal floor
  // of the doubles they are written in); measured 2026-12-03 on a small
  // gaussian case: -1000 certified, -1070 and -1100 not.
  cmd->add_option("--target-log2", args->target_log2,
                  "certified bound target, relative to the magnitude (default -80; -1000 to -53)")
      ->check(integer_in("--target-log2", -1000, -53, "-80"));
  cmd->add_option("--method", args->method, "fast (default: double-double, escalating to multiprecision) or multiprecision");
  cmd->add_option("--backend", args->backend, "multiprecision arithmetic: mpfr (default) or cpp_bin_float (independent cross-check)");
  cmd->callback([args] { exit_with(reference_main(*args)); });
}};

}  // namespace
}  // namespace headroom::cli
