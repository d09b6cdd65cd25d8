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
// families.h) at one shape of our choosing (B 1, H 2, Tq 64, Tk 256, D 64,
// no mask, the customary 1/sqrt(D) scale), RMSE of each kernel's output
// against the certified reference of the ORIGINAL (unquantised) values, as
// the table measures it, over several seeds. e4m3_tensorwise stands for the
// per-tensor row; e4m3_blockwise (64-token block scales) for the block row.
//
// What is reproduced: the direction (block scales give a lower RMSE than
// per-tensor scales) — asserted below. What is not: the ratio. Our block
// kernel has no incoherent processing (the Hadamard rotation that spreads
// each outlier over a head's channels), which the table's 9.1e-3 includes,
// and under E4M3's floating-point steps a per-tensor scale set by an outlier
// costs little precision on the other entries (they stay in the normal
// range): the error left is mostly the outliers' own rounding, which only the
// rotation reduces. The ratio measured is printed; the test asserts it stays
// below the table's 2.6 as well, so a change that made block scales look as
// good as block scales with the rotation would be noticed. The absolute RMSE
// also depends on the unstated shape and is printed, not asserted.
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

TEST(FlashAttention3Table3, BlockScalesBeatPerTensorScalesOnSparseOutliers) {
  double tensor_sum = 0, block_sum = 0;
  constexpr int kSeeds = 4;
  for (int seed = 1; seed <= kSeeds; ++seed) {
    CaseRequest req;
    req.family = "sparse_outliers";
    req.seed = static_cast<std::uint64_t>(seed);
    req.shape = CoreShape{1, 2, 2, 64, 256, 64, 64};
    req.mask = MaskKind::none;
    const Case c = make_case(req);
    ReferenceOptions ro;
    ro.threads = 2;
    const CoreReference src = reference_core(c.core, c.core_inputs, ro);
    const double t = rmse_against_source("e4m3_tensorwise", c, src);
    const double b = rmse_against_source("e4m3_blockwise", c, src);
    std::printf("seed %d: RMSE per-tensor %.3g, per-block %.3g\n", seed, t, b);
    tensor_sum += t;
    block_sum += b;
  }
  const double tensor_rmse = tensor_sum / kSeeds, block_rmse = block_sum / kSeeds;
  std::printf("mean RMSE per-tensor %.3g (table: ~2.4e-2), per-block %.3g (table, with incoherent processing: "
              "~9.1e-3), ratio %.2f (table: ~2.6)\n",
              tensor_rmse, block_rmse, tensor_rmse / block_rmse);
  EXPECT_LT(block_rmse, tensor_rmse);                // the direction: reproduced
  EXPECT_LT(tensor_rmse / block_rmse, 24e-3 / 9.1e-3);  // without the rotation, less than the table's gain
}

}  // namespace
}  // namespace headroom
