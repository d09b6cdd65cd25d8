// headroom — tests of the backward entry: declaration fields, packing, the call isolated or not.
//
// The gradients of the bundled f32_backward_tiled are checked here against a
// plain double-precision backward written out below from the published
// formulas (Dao et al. 2022, Alg. 4) — enough to show that the buffers reach
// the kernel and come back in the right places; their accuracy against the
// certified reference is the score stage's (score_backward_test).
#include <gtest/gtest.h>

#include <unistd.h>

#include <cmath>
#include <cstdio>
#include <cstring>
#include <stdexcept>

#include "attach_cases.h"
#include "plain_backward.h"
#include "headroom/attach.h"
#include "headroom/input_error.h"
#include "headroom/kernel.h"
#include "kernel_list.h"

namespace headroom {
namespace {

using testing::core_case;
using testing::Grads;
using testing::plain_backward;

Case with_upstream(Case c, std::uint32_t seed) {
  std::mt19937 rng(seed);
  const CoreShape& s = c.core.shape;
  c.d_o = testing::random_tensor({s.batch, s.q_heads, s.q_len, s.value_dim}, rng);
  return c;
}

TEST(AttachBackward, DeclarationCarriesTheBackwardEntry) {
  const auto k = attach_in_process(&hr_kernels::f32_backward_tiled);
  EXPECT_TRUE(k->declaration().backward);
  EXPECT_EQ(k->declaration().backward_flags, static_cast<std::uint32_t>(HR_BACKWARD_BIAS_GRAD));
  EXPECT_NE(declaration_summary(k->declaration()).find("backward=yes"), std::string::npos);
  EXPECT_FALSE(attach_in_process(&hr_kernels::f32_tiled_64)->declaration().backward);
}

TEST(AttachBackward, RefusesInconsistentBackwardFields) {
  auto refused = [](hr_kernel k, const std::string& field) {
    try {
      declaration_of(&k, "test table");
    } catch (const InputError& e) {
      EXPECT_NE(e.place().find(field), std::string::npos) << e.what();
      return;
    }
    ADD_FAILURE() << "accepted a declaration with a bad " << field;
  };
  hr_kernel bits = hr_kernels::f32_backward_tiled;
  bits.backward_flags = 1u << 7;
  refused(bits, "backward_flags");
  hr_kernel no_entry = hr_kernels::f32_tiled_64;
  no_entry.backward_flags = HR_BACKWARD_RECOMPUTES;
  refused(no_entry, "backward_flags");
  hr_kernel int8 = hr_kernels::i8_tokenwise;
  int8.run_backward = hr_kernels::f32_backward_tiled.run_backward;
  refused(int8, "run_backward");
}

TEST(AttachBackward, GradientsComeBackInPlaceIsolatedOrNot) {
  const auto k = attach_in_process(&hr_kernels::f32_backward_tiled);
  for (MaskKind kind : {MaskKind::none, MaskKind::causal_top_left, MaskKind::key_padding, MaskKind::bias}) {
    SCOPED_TRACE(std::string(mask_kind_name(kind)));
    const Case c = with_upstream(core_case({2, 4, 2, 5, 70, 8, 6}, kind, 11), 12);
    const ReceivedCase r = receive(c, k->declaration());
    const KernelRun fwd = k->run(r, RunOptions{false, 20.0, 0});
    ASSERT_EQ(fwd.status, RunStatus::ok) << fwd.detail;
    const BackwardRun a = k->run_backward(r, fwd.out, fwd.lse, RunOptions{true, 20.0, std::uint64_t{1} << 30});
    const BackwardRun b = k->run_backward(r, fwd.out, fwd.lse, RunOptions{false, 20.0, 0});
    ASSERT_EQ(a.status, RunStatus::ok) << a.detail;
    ASSERT_EQ(b.status, RunStatus::ok) << b.detail;
    EXPECT_TRUE(bit_identical(a.d_q, b.d_q) && bit_identical(a.d_k, b.d_k) && bit_identical(a.d_v, b.d_v) &&
                bit_identical(a.d_bias, b.d_bias));
    const Grads want = plain_backward(r.received);
    // d(bias) = dS only under a bias mask (the kernel declares HR_BACKWARD_BIAS_GRAD),
    // summed over the heads when they share one bias.
    EXPECT_EQ(a.d_bias.values.empty(), kind != MaskKind::bias);
    if (kind == MaskKind::bias) {
      const Tensor& bias = r.received.core.mask.bias;
      ASSERT_EQ(a.d_bias.shape, bias.shape);
      const CoreShape& s = r.received.core.shape;
      Tensor d_bias(bias.shape);
      for (std::int64_t bb = 0; bb < s.batch; ++bb)
        for (std::int64_t h = 0; h < s.q_heads; ++h)
          for (std::int64_t i = 0; i < s.q_len; ++i)
            for (std::int64_t j = 0; j < s.kv_len; ++j) d_bias.at(bb, bias.shape[1] == 1 ? 0 : h, i, j) += want.d_s.at(bb, h, i, j);
      for (std::size_t e = 0; e < d_bias.values.size(); ++e)
        EXPECT_NEAR(a.d_bias.values[e], d_bias.values[e], 1e-4 * (1 + std::fabs(d_bias.values[e]))) << e;
    }
    for (auto [got, exp] : {std::pair{&a.d_q, &want.d_q}, {&a.d_k, &want.d_k}, {&a.d_v, &want.d_v}}) {
      ASSERT_EQ(got->shape, exp->shape);
      for (std::size_t e = 0; e < got->values.size(); ++e)
        EXPECT_NEAR(got->values[e], exp->values[e], 1e-4 * (1 + std::fabs(exp->values[e]))) << e;
    }
  }
}

// ---- backward entries that misbehave, each one way --------------------------

std::int64_t count4(const std::int64_t e[4]) { return e[0] * e[1] * e[2] * e[3]; }

void zero_gradients(const hr_backward_problem* p) {
  for (const hr_out_tensor* t : {&p->d_q, &p->d_k, &p->d_v})
    std::memset(t->data, 0, static_cast<std::size_t>(count4(t->extents)) * sizeof(float));
}

int g_parent_pipe = -1;  // where reports_parent tells the test which process forked the call

std::int32_t reports_parent(const hr_backward_problem* p) {
  char comm[32] = {};
  FILE* f = std::fopen(("/proc/" + std::to_string(getppid()) + "/comm").c_str(), "r");
  if (f != nullptr) {
    if (std::fgets(comm, sizeof comm, f) == nullptr) comm[0] = '\0';
    std::fclose(f);
  }
  if (write(g_parent_pipe, comm, sizeof comm) != static_cast<ssize_t>(sizeof comm)) return HR_OK;
  zero_gradients(p);
  return HR_OK;
}

std::int32_t writes_past_d_k(const hr_backward_problem* p) {
  zero_gradients(p);
  static_cast<volatile float*>(p->d_k.data)[count4(p->d_k.extents) + 32] = 1.0f;  // past the canary: guard page
  return HR_OK;
}

std::int32_t writes_into_d_o(const hr_backward_problem* p) {
  zero_gradients(p);
  const_cast<float*>(static_cast<const float*>(p->d_o.data))[1] = 1.0f;
  return HR_OK;
}

std::int32_t aborts(const hr_backward_problem*) { std::abort(); }

BackwardRun run_misbehaving(std::int32_t (*entry)(const hr_backward_problem*)) {
  hr_kernel k = hr_kernels::f32_backward_tiled;
  k.run_backward = entry;
  const auto kernel = attach_in_process(&k);
  const ReceivedCase r = receive(with_upstream(core_case({1, 2, 1, 3, 5, 4, 4}, MaskKind::none, 7), 8),
                                 kernel->declaration());
  const KernelRun fwd = kernel->run(r, RunOptions{false, 20.0, 0});
  return kernel->run_backward(r, fwd.out, fwd.lse, RunOptions{true, 5.0, std::uint64_t{256} << 20});
}

TEST(AttachBackward, IsolatedBackwardCallsAreTheWorkersAndFaultLikeTheForward) {
  int fds[2];
  ASSERT_EQ(pipe(fds), 0);
  g_parent_pipe = fds[1];
  const BackwardRun ok = run_misbehaving(reports_parent);
  char comm[32] = {};
  ASSERT_EQ(read(fds[0], comm, sizeof comm), static_cast<ssize_t>(sizeof comm));
  close(fds[0]);
  close(fds[1]);
  EXPECT_EQ(ok.status, RunStatus::ok) << ok.detail;
  EXPECT_EQ(std::string(comm), "hr-worker\n");  // forked by the isolation worker, as forward calls are
  const BackwardRun past = run_misbehaving(writes_past_d_k);
  EXPECT_EQ(past.status, RunStatus::oob_write) << past.detail;
  EXPECT_NE(past.detail.find("output d_k"), std::string::npos) << past.detail;
  const BackwardRun into = run_misbehaving(writes_into_d_o);
  EXPECT_EQ(into.status, RunStatus::oob_write) << into.detail;
  EXPECT_NE(into.detail.find("wrote into input d_o"), std::string::npos) << into.detail;
  const BackwardRun crash = run_misbehaving(aborts);
  EXPECT_EQ(crash.status, RunStatus::crash) << crash.detail;
  EXPECT_NE(crash.detail.find("SIGABRT"), std::string::npos) << crash.detail;
}

TEST(AttachBackward, CallsNeedABackwardEntryAndAnUpstreamGradient) {
  const auto tiled = attach_in_process(&hr_kernels::f32_tiled_64);
  const auto k = attach_in_process(&hr_kernels::f32_backward_tiled);
  const Case c = core_case({1, 1, 1, 3, 4, 4, 4}, MaskKind::none, 3);
  const ReceivedCase plain = receive(c, k->declaration());
  const KernelRun fwd = k->run(plain, RunOptions{false, 20.0, 0});
  EXPECT_THROW(k->run_backward(plain, fwd.out, fwd.lse, RunOptions{false, 20.0, 0}), std::invalid_argument);
  const ReceivedCase r = receive(with_upstream(c, 4), tiled->declaration());
  EXPECT_THROW(tiled->run_backward(r, fwd.out, fwd.lse, RunOptions{false, 20.0, 0}), std::invalid_argument);
}

}  // namespace
}  // namespace headroom
