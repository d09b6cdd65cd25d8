// headroom bench — block rows: the certified block against the vectorised float64 block.
//
// The base shape of Vaswani et al. 2017 ("Attention Is All You Need", §3.2.2):
// d_model 512, 8 heads of 64, B = 1, Tq = Tk = T, unmasked, with biases;
// float32-valued inputs X ~ N(0, 1), weights ~ N(0, 1/512), biases ~ N(0, 0.01).
//   plain   plain_block (plain.h): vectorised float64 projections,
//           attention per head, output projection, same instruction set and
//           thread count as the reference
//   fast    reference_block, default method (fast_block.cpp)
//   mpfr    reference_block, method multiprecision (only with --block-mpfr:
//           minutes even at T = 128)
#include <algorithm>
#include <cmath>
#include <cstdio>
#include <random>

#include "headroom/reference.h"
#include "measure.h"
#include "plain.h"
#include "sections.h"

namespace bench {
namespace {

using headroom::Tensor;

struct Block {
  headroom::BlockProblem p;
  headroom::BlockInputs in;
};

Block make_block(std::int64_t t, std::uint64_t seed) {
  constexpr std::int64_t kModel = 512, kHeads = 8, kHeadDim = 64;
  Block b;
  b.p.shape = {1, t, t, kModel, kHeads, kHeads, kHeadDim, kHeadDim};
  b.p.scale = static_cast<float>(1.0 / std::sqrt(static_cast<double>(kHeadDim)));
  std::mt19937_64 rng(seed);
  auto fill = [&](std::vector<std::int64_t> shape, double sigma) {
    std::normal_distribution<double> dist(0.0, sigma);
    Tensor x(std::move(shape));
    for (double& v : x.values) v = static_cast<float>(dist(rng));
    return x;
  };
  const double w = 1.0 / std::sqrt(static_cast<double>(kModel));
  b.in.x_q = fill({1, t, kModel}, 1.0);
  b.in.x_kv = fill({1, t, kModel}, 1.0);
  b.in.w_q = fill({kModel, kHeads * kHeadDim}, w);
  b.in.w_k = fill({kModel, kHeads * kHeadDim}, w);
  b.in.w_v = fill({kModel, kHeads * kHeadDim}, w);
  b.in.w_o = fill({kHeads * kHeadDim, kModel}, w);
  b.in.b_q = fill({kHeads * kHeadDim}, 0.1);
  b.in.b_k = fill({kHeads * kHeadDim}, 0.1);
  b.in.b_v = fill({kHeads * kHeadDim}, 0.1);
  b.in.b_o = fill({kModel}, 0.1);
  return b;
}

Measure run_block(const Block& b, headroom::ReferenceMethod method, unsigned threads, int reps) {
  headroom::ReferenceOptions opt;
  opt.method = method;
  opt.threads = threads;
  headroom::BlockReference r;
  Measure m;
  m.seconds = best_of(reps, [&] { r = headroom::reference_block(b.p, b.in, opt); });
  m.certified = r.certified ? 1 : 0;
  m.escalated = static_cast<long long>(r.stats.escalated_rows + r.stats.redone_batches);
  for (std::size_t e = 0; e < r.bound.values.size(); ++e)
    m.worst = std::max(m.worst, r.bound.values[e] / r.magnitude.values[e]);
  return m;
}

}  // namespace

void block_section(const Options& opt) {
  std::printf("\nblock, d_model 512, 8 heads of 64, B = 1, Tq = Tk = T, biases, float32-valued inputs, %u thread(s) each, %s\n",
              opt.threads, cpu_clock() ? "CPU seconds of the measuring process" : "wall seconds");
  std::printf("plain = vectorised float64 block (%s); best of %d runs each%s\n", plain_isa(), opt.reps,
              opt.block_mpfr ? "; mpfr = all-MPFR block, one run" : "");
  std::printf("%6s | %10s %10s %12s | %11s %11s | %8s %8s | %10s %5s %9s\n", "T", "plain s", "fast s", "mpfr s",
              "fast/plain", "mpfr/fast", "MiB pl", "MiB fast", "worst b/m", "cert", "escalated");
  for (const std::int64_t t : opt.block_lengths) {
    const Block b = make_block(t, 7);
    const Measure plain = in_child([&] {
      std::vector<double> out;
      Measure m;
      m.seconds = best_of(opt.reps, [&] { plain_block(b.p, b.in, opt.threads, out); });
      return m;
    });
    const Measure fast = in_child([&] { return run_block(b, headroom::ReferenceMethod::fast, opt.threads, opt.reps); });
    Measure slow;
    slow.seconds = NAN;
    if (opt.block_mpfr)
      slow = in_child([&] { return run_block(b, headroom::ReferenceMethod::multiprecision, opt.threads, 1); });
    std::printf("%6lld | %10.4f %10.4f %12.3f | %11.2f %11.1f | %8.1f %8.1f | %10.3g %5s %9lld\n",
                static_cast<long long>(t), plain.seconds, fast.seconds, slow.seconds, fast.seconds / plain.seconds,
                slow.seconds / fast.seconds, plain.peak_mib, fast.peak_mib, fast.worst,
                fast.certified && (!opt.block_mpfr || slow.certified) ? "yes" : "NO", fast.escalated);
    std::fflush(stdout);
  }
}

}  // namespace bench
