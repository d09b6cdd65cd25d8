// The default budgets against the bundled kernels: every sound kernel passes on Gaussian cases (the
// worst figure against its limit is printed, pass or fail), and the flawed specimens whose defect is a
// numerical fault are caught by their expected class and no other.
#include <gtest/gtest.h>

#include <cmath>
#include <cstdio>
#include <random>
#include <stdexcept>
#include <string>

#include "headroom/attach.h"
#include "headroom/budget.h"
#include "headroom/bundled_registry.h"
#include "headroom/faults.h"
#include "headroom/reference.h"
#include "headroom/scores.h"

namespace headroom {
namespace {

Tensor gaussian(std::vector<std::int64_t> shape, double sigma, std::mt19937_64& gen) {
  Tensor t(std::move(shape));
  std::normal_distribution<double> n(0.0, sigma);
  for (double& x : t.values) x = static_cast<float>(n(gen));
  return t;
}

Case gaussian_case(CoreShape s, Mask m, std::uint64_t seed, double q_sigma = 1.0) {
  std::mt19937_64 gen(seed);
  Case c;
  c.name = "budget_bundled_" + std::to_string(seed);
  c.core.shape = s;
  c.core.scale = static_cast<float>(1.0 / std::sqrt(static_cast<double>(s.key_dim)));  // Vaswani et al. 2017
  c.core.mask = std::move(m);
  c.core_inputs.q = gaussian({s.batch, s.q_heads, s.q_len, s.key_dim}, q_sigma, gen);
  c.core_inputs.k = gaussian({s.batch, s.kv_heads, s.kv_len, s.key_dim}, 1.0, gen);
  c.core_inputs.v = gaussian({s.batch, s.kv_heads, s.kv_len, s.value_dim}, 1.0, gen);
  return c;
}

Mask kind(MaskKind k) {
  Mask m;
  m.kind = k;
  return m;
}

Mask padding(std::vector<std::int64_t> lengths) {
  Mask m = kind(MaskKind::key_padding);
  m.key_lengths = std::move(lengths);
  return m;
}

std::vector<Case> gaussian_cases() {
  return {
      gaussian_case({1, 2, 2, 16, 16, 64, 64}, kind(MaskKind::none), 11),
      gaussian_case({2, 2, 1, 33, 100, 32, 16}, kind(MaskKind::causal_top_left), 12),
      gaussian_case({1, 1, 1, 4, 1000, 64, 32}, kind(MaskKind::none), 13),
      gaussian_case({2, 2, 2, 17, 129, 8, 8}, padding({129, 70}), 14),
      gaussian_case({1, 2, 2, 12, 40, 20, 12}, kind(MaskKind::causal_bottom_right), 15),
  };
}

// A block case: Vaswani et al. 2017's layout at a small width, weights σ = 1/√Dm.
Case block_case(BlockShape s, Mask m, std::uint64_t seed) {
  std::mt19937_64 gen(seed);
  Case c;
  c.name = "budget_bundled_block_" + std::to_string(seed);
  c.level = Level::block;
  c.block.shape = s;
  c.block.scale = static_cast<float>(1.0 / std::sqrt(static_cast<double>(s.key_dim)));
  c.block.mask = std::move(m);
  const double w = 1.0 / std::sqrt(static_cast<double>(s.model_dim));
  BlockInputs& in = c.block_inputs;
  in.x_q = gaussian({s.batch, s.q_len, s.model_dim}, 1.0, gen);
  in.x_kv = gaussian({s.batch, s.kv_len, s.model_dim}, 1.0, gen);
  in.w_q = gaussian({s.model_dim, s.q_heads * s.key_dim}, w, gen);
  in.w_k = gaussian({s.model_dim, s.kv_heads * s.key_dim}, w, gen);
  in.w_v = gaussian({s.model_dim, s.kv_heads * s.value_dim}, w, gen);
  in.w_o = gaussian({s.q_heads * s.value_dim, s.model_dim}, w, gen);
  return c;
}

// Scores, faults and the default verdict of a bundled block kernel on one case.
Verdict judge_block(const std::string& name, const Case& c, CaseFaults& f, CaseScore& s) {
  const BundledKernel* bk = find_bundled(name);
  if (bk == nullptr) throw std::runtime_error("no bundled kernel " + name);
  auto kernel = attach_in_process(bk->kernel);
  DetectorOptions opt;
  opt.max_leak_patterns = 4;
  ReceivedCase rc = receive(c, bk->declaration);
  const KernelRun first = kernel->run(rc, opt.run);
  if (first.status != RunStatus::ok) throw std::runtime_error(name + ": " + first.detail);
  const BlockReference ref = reference_block(rc.received.block, rc.received.block_inputs);
  s = score_block(first.out, ref, bk->declaration.output_format);
  f = detect_faults(*kernel, rc, first, ref, opt);
  return judge(&s, f, default_budget(bk->declaration.input_format), accumulation_length(c));
}

TEST(DefaultBudgets, BlockKernelPassesAndSwappedHeadsFailOnErrorAlone) {
  // Key padding leaves keys masked for every head (the block leak probe's
  // unit); Tq ≠ Tk with a causal mask exercises the alignment check.
  for (const Case& c : {block_case({2, 6, 10, 32, 4, 2, 8, 8}, padding({10, 7}), 31),
                        block_case({1, 5, 9, 24, 2, 2, 12, 12}, kind(MaskKind::causal_bottom_right), 32)}) {
    CaseFaults f;
    CaseScore s;
    const Verdict v = judge_block("block_f32", c, f, s);
    std::string why;
    for (const VerdictReason& r : v.reasons) why += r.text + "\n";
    EXPECT_TRUE(v.pass) << c.name << "\n" << why;
    EXPECT_GT(f.runs, 0);
    std::printf("block_f32 on %s: max scaled error %.3g\n", c.name.c_str(), s.max_scaled_error);
    // The specimen's only trace is its error ("error" in the table): no fault class fires.
    const Verdict swapped = judge_block("block_heads_swapped", c, f, s);
    EXPECT_TRUE(f.faults.empty()) << f.faults.front().detail;
    EXPECT_FALSE(swapped.pass);
    EXPECT_EQ(swapped.reasons.at(0).what, "max_scaled_error");
  }
}

TEST(DefaultBudgets, SoundBundledCoreKernelsPassOnGaussianCases) {
  RunOptions run;
  run.isolate = false;  // sound kernels; the attach tests cover isolation
  DetectorOptions opt;
  opt.run = run;
  opt.max_leak_patterns = 4;
  int judged = 0;
  for (const BundledKernel& bk : bundled_kernels()) {
    if (bk.flawed || bk.declaration.level != Level::core) continue;
    // A kernel that takes a wide format and rounds to 8 bits inside
    // (e4m3_blockwise_rotated) is outside its input format's defaults by
    // design; budgets/bundled.toml holds its section (qualify_selfcheck_test).
    if (bk.declaration.p_quant && !is_fp8(bk.declaration.input_format)) continue;
    auto kernel = attach_in_process(bk.kernel);
    const KernelBudget budget = default_budget(bk.declaration.input_format);
    double worst_scaled = 0, worst_rmse = 0;
    for (const Case& c : gaussian_cases()) {
      if (why_unfit(c, bk.declaration)) continue;
      ReceivedCase rc = receive(c, bk.declaration);
      const KernelRun first = kernel->run(rc, run);
      ASSERT_EQ(first.status, RunStatus::ok) << bk.declaration.name << " " << c.name << ": " << first.detail;
      const CoreReference ref = reference_core(rc.received.core, rc.received.core_inputs);
      const CaseScore s = score_core(first.out, first.lse.values.empty() ? nullptr : &first.lse, ref,
                                     bk.declaration.output_format);
      const CaseFaults f = detect_faults(*kernel, rc, first, ref, opt);
      const std::int64_t n = accumulation_length(c);
      const Verdict v = judge(&s, f, budget, n);
      std::string why;
      for (const VerdictReason& r : v.reasons) why += r.text + "\n";
      EXPECT_TRUE(v.pass) << bk.declaration.name << " on " << c.name << ":\n" << why;
      worst_scaled = std::max(worst_scaled, s.max_scaled_error / budget.scaled_error_limit(n, s.format));
      worst_rmse = std::max(worst_rmse, s.relative_rmse / budget.rel_rmse_limit(n, s));
      ++judged;
    }
    // Always print the worst figure seen (STYLE.md).
    std::printf("%-14s worst max_scaled_error / limit %.3f, worst rel_rmse / limit %.3f\n",
                bk.declaration.name.c_str(), worst_scaled, worst_rmse);
  }
  EXPECT_GE(judged, 10);
}

struct Specimen {
  const char* name;
  Case c;
  FaultClass expected;
};

TEST(Specimens, NumericalDefectsAreCaughtByTheirClassOnly) {
  std::vector<Specimen> specimens;
  // Logits past 88.7 overflow exp without a max shift: |z| ~ 40·√Dk·… with σ_q = 40.
  specimens.push_back({"no_max_shift", gaussian_case({1, 1, 1, 8, 24, 16, 8}, kind(MaskKind::none), 21, 40.0),
                       FaultClass::non_finite});
  // Length 35 of 40 puts the row bound inside the tail tile (16-key tiles).
  specimens.push_back({"mask_tail_off_by_one", gaussian_case({1, 1, 1, 6, 40, 8, 8}, padding({35}), 22),
                       FaultClass::mask_leak});
  specimens.push_back({"nan_masked_rows", gaussian_case({2, 1, 1, 5, 9, 8, 4}, padding({0, 9}), 23),
                       FaultClass::convention});
  specimens.push_back({"causal_flipped", gaussian_case({1, 1, 1, 5, 12, 8, 4}, kind(MaskKind::causal_bottom_right), 24),
                       FaultClass::convention});
  DetectorOptions opt;
  opt.max_leak_patterns = 4;
  for (const Specimen& sp : specimens) {
    const BundledKernel* bk = find_bundled(sp.name);
    ASSERT_NE(bk, nullptr) << sp.name;
    EXPECT_EQ(bk->expected_fault, fault_class_name(sp.expected)) << sp.name;
    auto kernel = attach_in_process(bk->kernel);
    ReceivedCase rc = receive(sp.c, bk->declaration);
    const KernelRun first = kernel->run(rc, opt.run);
    ASSERT_EQ(first.status, RunStatus::ok) << sp.name << ": " << first.detail;
    const CoreReference ref = reference_core(rc.received.core, rc.received.core_inputs);
    const CaseFaults f = detect_faults(*kernel, rc, first, ref, opt);
    std::string all;
    for (const Fault& x : f.faults) all += std::string(fault_class_name(x.kind)) + ": " + x.detail + "\n";
    ASSERT_EQ(f.faults.size(), 1u) << sp.name << "\n" << all;
    EXPECT_EQ(f.faults[0].kind, sp.expected) << sp.name << "\n" << all;
    std::printf("%-22s %s", sp.name, all.c_str());
  }
}

}  // namespace
}  // namespace headroom
