// headroom tests — the external-program exchange's backward side: `CMD run-backward DIR`.
//
// A NumPy training kernel written against docs/external-program.md alone
// (examples/external/numpy_backward.py) gives back the gradients of a plain
// double backward (tests/plain_backward.h) under causal (with fully masked
// rows), key-padding, dense and bias masks, grouped heads, and a bias
// gradient shared by the heads; a scripted shell program sees the
// documented files and faults exactly as the forward's exchange does.
#include <gtest/gtest.h>
#include <unistd.h>

#include <chrono>
#include <cmath>
#include <filesystem>
#include <fstream>
#include <string>

#include <nlohmann/json.hpp>

#include "attach_cases.h"
#include "headroom/attach.h"
#include "headroom/external_program.h"
#include "headroom/format.h"
#include "headroom/input_error.h"
#include "headroom/kernel_abi.h"
#include "headroom/npy.h"
#include "kernel_list.h"
#include "plain_backward.h"

namespace headroom {
namespace {

namespace fs = std::filesystem;
using testing::core_case;

bool contains(const std::string& s, const std::string& part) { return s.find(part) != std::string::npos; }

Case with_upstream(Case c, std::uint32_t seed) {
  std::mt19937 rng(seed);
  const CoreShape& s = c.core.shape;
  c.d_o = testing::random_tensor({s.batch, s.q_heads, s.q_len, s.value_dim}, rng);
  return c;
}

// The bias of `c` kept for query head 0 only, shared by every head: [B, 1, Tq, Tk].
Case shared_bias(Case c) {
  const CoreShape& s = c.core.shape;
  Tensor one({s.batch, 1, s.q_len, s.kv_len});
  for (std::int64_t b = 0; b < s.batch; ++b)
    for (std::int64_t i = 0; i < s.q_len; ++i)
      for (std::int64_t j = 0; j < s.kv_len; ++j) one.at(b, 0, i, j) = c.core.mask.bias.at(b, 0, i, j);
  c.core.mask.bias = one;
  return c;
}

double worst_gap(const Tensor& got, const Tensor& want) {
  EXPECT_EQ(got.shape, want.shape);
  double worst = 0;
  for (std::size_t e = 0; e < got.values.size() && e < want.values.size(); ++e)
    worst = std::max(worst, std::fabs(got.values[e] - want.values[e]) / (1 + std::fabs(want.values[e])));
  return worst;
}

TEST(ProgramBackward, NumpyExampleGivesThePlainGradientsUnderMasksGroupsAndASharedBias) {
  auto k = attach_program("/usr/bin/python3 " HEADROOM_SOURCE_DIR "/examples/external/numpy_backward.py", 20.0);
  const KernelDeclaration& d = k->declaration();
  ASSERT_TRUE(d.backward);
  ASSERT_EQ(d.backward_flags, static_cast<std::uint32_t>(HR_BACKWARD_BIAS_GRAD));
  // O and lse from the bundled float32 forward, in process: one program start per case.
  const auto forward = attach_in_process(&hr_kernels::f32_tiled_64);
  const RunOptions opt{true, 20.0, 0};
  std::uint32_t seed = 500;
  for (MaskKind m : {MaskKind::causal_bottom_right, MaskKind::key_padding, MaskKind::dense, MaskKind::bias}) {
    for (bool shared : {false, true}) {
      if (shared && m != MaskKind::bias) continue;
      SCOPED_TRACE(std::string(mask_kind_name(m)) + (shared ? " shared by the heads" : ""));
      // Grouped heads (4 query heads on 2), Dk ≠ Dv, Tq > Tk under causal_bottom_right: fully masked rows.
      Case c = with_upstream(core_case({2, 4, 2, 7, 5, 6, 3}, m, seed, true), seed + 1);
      seed += 2;
      if (shared) c = shared_bias(c);
      const ReceivedCase r = receive(c, d);
      ASSERT_EQ(r.input_format, receive(c, forward->declaration()).input_format);  // float32 both
      const KernelRun fwd = forward->run(r, RunOptions{false, 20.0, 0});
      ASSERT_EQ(fwd.status, RunStatus::ok) << fwd.detail;
      const BackwardRun g = k->run_backward(r, fwd.out, fwd.lse, opt);
      ASSERT_EQ(g.status, RunStatus::ok) << g.detail;
      const testing::Grads want = testing::plain_backward(r.received);
      // float32 arithmetic over sums of at most 14 terms of magnitude ≲ 10 (about 14 · 2^-24 · 10 ≈ 1e-5
      // at worst, a few 1e-7 in practice; Higham 2002 §3.1): 1e-4 relative to 1 + |g| is above that and far
      // below a misplaced or unsummed tensor.
      EXPECT_LT(worst_gap(g.d_q, want.d_q), 1e-4);
      EXPECT_LT(worst_gap(g.d_k, want.d_k), 1e-4);
      EXPECT_LT(worst_gap(g.d_v, want.d_v), 1e-4);
      if (m != MaskKind::bias) {
        EXPECT_TRUE(g.d_bias.values.empty());
        continue;
      }
      // d(bias) = dS, summed over the heads that share one bias.
      const CoreShape& s = c.core.shape;
      Tensor d_bias(r.received.core.mask.bias.shape);
      for (std::int64_t b = 0; b < s.batch; ++b)
        for (std::int64_t h = 0; h < s.q_heads; ++h)
          for (std::int64_t i = 0; i < s.q_len; ++i)
            for (std::int64_t j = 0; j < s.kv_len; ++j) d_bias.at(b, shared ? 0 : h, i, j) += want.d_s.at(b, h, i, j);
      EXPECT_LT(worst_gap(g.d_bias, d_bias), 1e-4);
    }
  }
}

// ---- a scripted program: the files it is given, and its faults --------------

class ScriptedBackward : public ::testing::Test {
 protected:
  static CoreShape shape() { return {1, 4, 2, 3, 5, 4, 6}; }
  static void SetUpTestSuite() {
    fix_ = fs::temp_directory_path() / ("headroom-program-backward-" + std::to_string(getpid()));
    fs::create_directories(fix_);
    const CoreShape s = shape();
    write_npy(fix_ / "d_q.npy", tensor_to_npy(Tensor({s.batch, s.q_heads, s.q_len, s.key_dim}), Format::float32));
    write_npy(fix_ / "d_k.npy", tensor_to_npy(Tensor({s.batch, s.kv_heads, s.kv_len, s.key_dim}), Format::float32));
    write_npy(fix_ / "d_v.npy", tensor_to_npy(Tensor({s.batch, s.kv_heads, s.kv_len, s.value_dim}), Format::float32));
    write_npy(fix_ / "d_v_f8.npy",
              tensor_to_npy(Tensor({s.batch, s.kv_heads, s.kv_len, s.value_dim}), Format::float64));
    write_npy(fix_ / "d_k_as_q.npy",  // dK shaped like dQ: the group not summed
              tensor_to_npy(Tensor({s.batch, s.q_heads, s.kv_len, s.key_dim}), Format::float32));
    KernelDeclaration d;
    d.name = "scripted_backward";
    d.mask_kinds = HR_MASK_NONE | HR_MASK_BIAS;
    d.returns_lse = true;
    d.backward = true;
    d.backward_flags = HR_BACKWARD_BIAS_GRAD;
    std::ofstream(fix_ / "decl.json") << declaration_to_json(d);
    std::ofstream(fix_ / "prog.sh") << R"(fix=$(dirname "$0")
mode=$1; shift
[ "$1" = describe ] && { cat "$fix/decl.json"; exit 0; }
[ "$1" = run-backward ] || exit 9
dir=$2
good() { for g in d_q d_k d_v; do cp "$fix/$g.npy" "$dir/$g.npy"; done; }
case $mode in
  keep) rm -rf "$fix/seen"; cp -r "$dir" "$fix/seen"; exit 77 ;;
  good) good ;;
  no_d_k) good; rm "$dir/d_k.npy" ;;
  d_v_dtype) good; cp "$fix/d_v_f8.npy" "$dir/d_v.npy" ;;
  d_k_shape) good; cp "$fix/d_k_as_q.npy" "$dir/d_k.npy" ;;
  hang) exec sleep 30 ;;
  fail) echo 'backward exploded' >&2; exit 3 ;;
esac
exit 0
)";
  }
  static void TearDownTestSuite() { fs::remove_all(fix_); }
  static BackwardRun run(const std::string& mode, MaskKind m = MaskKind::none, double limit_s = 5.0) {
    auto k = attach_program("/bin/sh " + (fix_ / "prog.sh").string() + " " + mode, 5.0);
    const ReceivedCase r = receive(with_upstream(core_case(shape(), m, 600), 601), k->declaration());
    const CoreShape s = shape();
    Tensor o({s.batch, s.q_heads, s.q_len, s.value_dim}), lse({s.batch, s.q_heads, s.q_len});
    for (std::size_t i = 0; i < o.values.size(); ++i) o.values[i] = 0.1 * static_cast<double>(i) + 1e-9;  // not float32
    for (std::size_t i = 0; i < lse.values.size(); ++i) lse.values[i] = 1.0 / 3.0 + static_cast<double>(i);
    lse.values[1] = -INFINITY;
    return k->run_backward(r, o, lse, RunOptions{true, limit_s, 0});
  }
  static fs::path fix_;
};
fs::path ScriptedBackward::fix_;

TEST_F(ScriptedBackward, TheFolderHoldsTheDocumentedFiles) {
  const BackwardRun declined = run("keep", MaskKind::bias);
  EXPECT_EQ(declined.status, RunStatus::unsupported) << declined.detail;
  const fs::path seen = fix_ / "seen";
  nlohmann::json p;
  std::ifstream(seen / "problem.json") >> p;
  EXPECT_EQ(p["pass"], "backward");
  EXPECT_EQ(p["inputs"]["o"], "o.npy");
  EXPECT_EQ(p["inputs"]["lse"], "lse.npy");
  EXPECT_EQ(p["inputs"]["d_o"], "d_o.npy");
  EXPECT_EQ(p["mask"]["file"], "bias.npy");
  EXPECT_EQ(p["outputs"]["d_q"]["shape"], nlohmann::json({1, 4, 3, 4}));
  EXPECT_EQ(p["outputs"]["d_k"]["shape"], nlohmann::json({1, 2, 5, 4}));
  EXPECT_EQ(p["outputs"]["d_v"]["shape"], nlohmann::json({1, 2, 5, 6}));
  EXPECT_EQ(p["outputs"]["d_bias"]["shape"], nlohmann::json({1, 4, 3, 5}));
  EXPECT_EQ(p["outputs"]["d_bias"]["dtype"], "<f4");
  const CoreShape s = shape();
  const NpyArray o = read_npy(seen / "o.npy"), lse = read_npy(seen / "lse.npy"), d_o = read_npy(seen / "d_o.npy");
  EXPECT_EQ(o.descr, "<f4");
  EXPECT_EQ(lse.descr, "<f4");
  EXPECT_EQ(d_o.descr, "<f4");
  EXPECT_EQ(lse.shape, (std::vector<std::int64_t>{s.batch, s.q_heads, s.q_len}));
  const Tensor ot = npy_to_tensor(o, seen / "o.npy"), lt = npy_to_tensor(lse, seen / "lse.npy");
  // O and lse arrive rounded to the output format and float32, −inf kept.
  EXPECT_EQ(ot.values[7], static_cast<double>(static_cast<float>(0.1 * 7.0 + 1e-9)));
  EXPECT_EQ(lt.values[0], static_cast<double>(static_cast<float>(1.0 / 3.0)));
  EXPECT_EQ(lt.values[1], -INFINITY);
  KernelDeclaration d;
  d.name = "same_inputs";
  d.mask_kinds = HR_MASK_BIAS;
  const ReceivedCase r = receive(with_upstream(core_case(shape(), MaskKind::bias, 600), 601), d);
  EXPECT_TRUE(bit_identical(npy_to_tensor(d_o, seen / "d_o.npy"), r.received.d_o));
  EXPECT_TRUE(bit_identical(npy_to_tensor(read_npy(seen / "bias.npy"), seen / "bias.npy"), r.received.core.mask.bias));
}

TEST_F(ScriptedBackward, FaultsAreTheForwardsNamingTheFile) {
  const BackwardRun good = run("good");
  ASSERT_EQ(good.status, RunStatus::ok) << good.detail;
  EXPECT_EQ(good.d_k.shape, (std::vector<std::int64_t>{1, 2, 5, 4}));
  EXPECT_TRUE(good.d_bias.values.empty());  // no bias mask: no d_bias asked for
  const BackwardRun no_bias_grad = run("good", MaskKind::bias);
  EXPECT_EQ(no_bias_grad.status, RunStatus::bad_output);
  EXPECT_TRUE(contains(no_bias_grad.detail, "d_bias.npy: not written")) << no_bias_grad.detail;
  const struct {
    const char* mode;
    RunStatus status;
    const char* part;
  } faults[] = {{"no_d_k", RunStatus::bad_output, "d_k.npy: not written"},
                {"d_v_dtype", RunStatus::bad_output, "d_v.npy: dtype '<f8', expected '<f4'"},
                {"d_k_shape", RunStatus::bad_output, "d_k.npy: shape [1,4,5,4], expected [1,2,5,4]"},
                {"fail", RunStatus::crash, "exit code 3; stderr: backward exploded"}};
  for (const auto& f : faults) {
    const BackwardRun b = run(f.mode);
    EXPECT_EQ(run_status_name(b.status), std::string(run_status_name(f.status))) << f.mode << ": " << b.detail;
    EXPECT_TRUE(contains(b.detail, f.part)) << f.mode << ": " << b.detail;
  }
  const auto start = std::chrono::steady_clock::now();
  const BackwardRun hang = run("hang", MaskKind::none, 0.3);
  EXPECT_EQ(hang.status, RunStatus::timeout) << hang.detail;
  EXPECT_TRUE(contains(hang.detail, "run-backward")) << hang.detail;
  EXPECT_LT(std::chrono::duration<double>(std::chrono::steady_clock::now() - start).count(), 3.0);
}

TEST_F(ScriptedBackward, CallsNeedADeclaredBackwardAndAnUpstreamGradient) {
  auto k = attach_program("/bin/sh " + (fix_ / "prog.sh").string() + " good", 5.0);
  const CoreShape s = shape();
  const Tensor o({s.batch, s.q_heads, s.q_len, s.value_dim}), lse({s.batch, s.q_heads, s.q_len});
  const ReceivedCase no_d_o = receive(core_case(s, MaskKind::none, 602), k->declaration());
  EXPECT_THROW(k->run_backward(no_d_o, o, lse, RunOptions{}), std::invalid_argument);
  const ReceivedCase r = receive(with_upstream(core_case(s, MaskKind::none, 602), 603), k->declaration());
  EXPECT_THROW(k->run_backward(r, lse, lse, RunOptions{}), std::invalid_argument);  // O misshapen
}

// ---- the declaration ----------------------------------------------------------

TEST(ProgramBackwardDeclaration, RoundTripsAndRefusesWhatItCannotJudge) {
  KernelDeclaration d;
  d.name = "train";
  d.mask_kinds = HR_MASK_NONE;
  d.backward = true;
  d.backward_flags = HR_BACKWARD_RECOMPUTES | HR_BACKWARD_NONDETERMINISTIC;
  const KernelDeclaration back = declaration_from_json(declaration_to_json(d), "rt");
  EXPECT_TRUE(back.backward);
  EXPECT_EQ(back.backward_flags, d.backward_flags);
  d.backward_flags = HR_BACKWARD_BIAS_GRAD;
  EXPECT_EQ(declaration_from_json(declaration_to_json(d), "rt").backward_flags, d.backward_flags);
  d.backward = false;
  d.backward_flags = 0;
  EXPECT_FALSE(declaration_from_json(declaration_to_json(d), "rt").backward);

  const std::string good = R"("protocol": 2, "name": "k", "level": "core", "input_format": "float32",
                              "output_format": "float32", "mask_kinds": ["none"], "masked_row": "zeros")";
  const struct {
    std::string json;
    const char* place;
  } bad[] = {
      {"{" + good + ", \"backward\": 1}", "backward"},
      {"{" + good + ", \"backward\": true, \"backward_flags\": [\"atomic\"]}", "backward_flags"},
      {"{" + good + ", \"backward_flags\": [\"recomputes\"]}", "backward_flags"},  // flags without a backward
      {R"({"protocol": 1, "name": "k", "level": "core", "input_format": "float32", "output_format": "float32",
           "mask_kinds": ["none"], "masked_row": "zeros", "backward": true})", "backward"},  // protocol 2 only
      {R"({"protocol": 2, "name": "k", "level": "block", "input_format": "float32", "output_format": "float32",
           "mask_kinds": ["none"], "masked_row": "zeros", "backward": true})", "backward"},
      {R"({"protocol": 2, "name": "k", "level": "core", "input_format": "float32", "output_format": "float32",
           "mask_kinds": ["none"], "masked_row": "zeros", "backward": true, "features": ["softcap"]})", "features"},
  };
  for (const auto& b : bad) {
    try {
      declaration_from_json(b.json, "`my program`");
      ADD_FAILURE() << b.json << " accepted";
    } catch (const InputError& e) {
      EXPECT_TRUE(contains(e.place(), b.place)) << e.what();
      EXPECT_FALSE(e.fix().empty());
    }
  }
}

}  // namespace
}  // namespace headroom
