// headroom — the bundled E4M3 kernels on the outlier distribution of
// FlashAttention-3's FP8 accuracy table, read against that table.
//
// Outside source: Shah et al. 2024, "FlashAttention-3: Fast and Accurate
// Attention with Asynchrony and Low-precision", §4.3, Table 3 (figures from
// memory): RMSE against an FP64 reference on Q, K, V with entries
// N(0,1) + N(0,100)·Bernoulli(0.001), FP8 with per-tensor scaling about
// 2.4e-2, FP8 with block quantisation and incoherent processing about 9.1e-3
// (a ratio of about 2.6). The shape is not given there.
//
// What this test does: the `sparse_outliers` family (that distribution,
// families.h) at one shape of our choosing (B 1, H 2, Tq 16, Tk 256, D 64,
// no mask, the customary 1/sqrt(D) scale), RMSE of each kernel's output
// against the certified reference of the ORIGINAL (unquantised) values, as
// the table measures it, averaged over 16 seeds (the outliers fall
// differently in each; one seed's RMSE moves by up to ±50 %). e4m3_tensorwise
// stands for the per-tensor row; e4m3_blockwise (64-token block scales) for
// block quantisation alone; e4m3_blockwise_rotated (the same block scales
// after rotating Q and K by a fixed Hadamard-times-random-signs matrix, inside
// the kernel) for the table's block quantisation with incoherent processing.
// All three see the same source values: the first two receive them as E4M3
// codes quantised by headroom, the third as float32, and quantises itself.
//
// What is reproduced: both directions — block scales give a lower RMSE than
// per-tensor scales, and rotating Q and K lowers it again — asserted below
// (measured at this shape: 1.60e-2, 1.47e-2, 1.23e-2). What is not: the size
// of the gain. The table's per-tensor / (block + incoherent) ratio is about
// 2.6; ours is about 1.3. E4M3 is a floating-point format: rounding costs up
// to 2^-4 of each value whatever its scale, so a scale set by an outlier
// costs the other entries little (they stay in the normal range), and a
// rotation does not shrink the rounding error of a score in the mean square
// (E Σ_d (q'_d k'_d)² is about ‖q‖²‖k‖²/n for the rotated q', k' of length n,
// as Σ_d q_d² k_d² is for most unrotated pairs); it spreads the outliers'
// large errors into many small ones. What in the paper's setting gives
// the larger gain (the tensor cores' FP8 accumulation, the baseline's own
// choices) is not emulated here and not known to us. The ratio is printed and
// asserted to stay below the table's, so a change that made it reach the
// table would be noticed and this comment revisited. The absolute RMSE
// depends on the unstated shape and is printed, not asserted.
#include <gtest/gtest.h>

#include <cmath>
#include <cstdio>

#include "headroom/attach.h"
#include "headroom/bundled_registry.h"
#include "headroom/generate.h"
#include "headroom/reference.h"

namespace headroom {
namespace {

double rmse_against_source(const char* kernel, const Case& c, const CoreReference& of_source) {
  const BundledKernel* b = find_bundled(kernel);
  EXPECT_NE(b, nullptr) << kernel;
  auto k = attach_in_process(b->kernel);
  const ReceivedCase rc = receive(c, k->declaration());
  RunOptions opt;
  opt.isolate = false;
  const KernelRun run = k->run(rc, opt);
  EXPECT_EQ(run.status, RunStatus::ok) << kernel;
  double sum = 0;
  for (std::size_t i = 0; i < run.out.values.size(); ++i) {
    const double e = run.out.values[i] - of_source.out.values[i];
    sum += e * e;
  }
  return std::sqrt(sum / static_cast<double>(run.out.values.size()));
}

TEST(FlashAttention3Table3, BlockScalesThenRotationLowerTheRmseOnSparseOutliers) {
  double tensor_sum = 0, block_sum = 0, rotated_sum = 0;
  constexpr int kSeeds = 16;
  for (int seed = 1; seed <= kSeeds; ++seed) {
    CaseRequest req;
    req.family = "sparse_outliers";
    req.seed = static_cast<std::uint64_t>(seed);
    req.shape = CoreShape{1, 2, 2, 16, 256, 64, 64};
    req.mask = MaskKind::none;
    const Case c = make_case(req);
    ReferenceOptions ro;
    ro.threads = 2;
    const CoreReference src = reference_core(c.core, c.core_inputs, ro);
    const double t = rmse_against_source("e4m3_tensorwise", c, src);
    const double b = rmse_against_source("e4m3_blockwise", c, src);
    const double r = rmse_against_source("e4m3_blockwise_rotated", c, src);
    std::printf("seed %d: RMSE per-tensor %.3g, per-block %.3g, per-block rotated %.3g\n", seed, t, b, r);
    tensor_sum += t;
    block_sum += b;
    rotated_sum += r;
  }
  const double tensor_rmse = tensor_sum / kSeeds, block_rmse = block_sum / kSeeds, rotated_rmse = rotated_sum / kSeeds;
  std::printf("mean RMSE per-tensor %.3g (table: ~2.4e-2), per-block %.3g, per-block rotated %.3g (table, block "
              "with incoherent processing: ~9.1e-3); per-tensor / rotated %.2f (table: ~2.6)\n",
              tensor_rmse, block_rmse, rotated_rmse, tensor_rmse / rotated_rmse);
  EXPECT_LT(block_rmse, tensor_rmse);                      // block scales: reproduced
  EXPECT_LT(rotated_rmse, block_rmse);                     // incoherent processing: reproduced
  EXPECT_LT(tensor_rmse / rotated_rmse, 24e-3 / 9.1e-3);  // the size of the gain: not reproduced
}

}  // namespace
}  // namespace headroom
