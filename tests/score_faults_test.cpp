// Tests of the fault detectors through the attach API, with test-only kernels that each carry one defect:
// every defect must be caught by its class and by no other, and the sound kernel by none.
#include <gtest/gtest.h>

#include <cmath>
#include <limits>
#include <random>
#include <string>

#include "headroom/attach.h"
#include "headroom/faults.h"
#include "headroom/kernel_abi.h"
#include "headroom/reference.h"

namespace headroom {
namespace {

constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();

enum class Defect {
  none,
  leak_next_key,
  nondeterministic,
  nondeterministic_rarely,  // differs on every third call only: two determinism runs miss it
  wrong_head,               // grouped-query: head h reads kv head (kv_head_of(h) + 1) mod Hkv
  jitter_when_poisoned,     // sound, but out[1] moves one float ulp whenever kv head 1's V is poisoned (|v| > 100):
                            // rounding jitter that happens to coincide with the probe's poisoned calls
  faint_leak,               // every masked key adds 2^-36·v to the numerator: a leak the size of an ulp
  nan_masked_rows,
  flip_causal,
  inf_first,
  status
};

// Attention in double on the received values, rounded to float32, with one
// optional defect. For int8 it reads the codes (k8, v8), not the dequantised
// tensors, as a real int8 kernel would.
class TestKernel : public AttachedKernel {
 public:
  TestKernel(Defect d, Format in = Format::float32, RunStatus status = RunStatus::ok) : defect_(d), status_(status) {
    decl_.name = "test_kernel";
    decl_.input_format = in;
    decl_.output_format = Format::float32;
    decl_.mask_kinds = 0x3F;  // every HR_MASK_* bit
    decl_.masked_row = MaskedRowConvention::zeros;
    if (in == Format::int8) {
      decl_.q_quant = decl_.k_quant = decl_.v_quant = QuantScheme{Granularity::per_token, false};
    }
  }
  const KernelDeclaration& declaration() const override { return decl_; }

  KernelRun run(const ReceivedCase& c, const RunOptions&) override {
    ++calls_;
    KernelRun r;
    r.status = status_;
    if (status_ != RunStatus::ok) {
      r.detail = "test status";
      return r;
    }
    const CoreShape& s = c.received.core.shape;
    Mask mask = c.received.core.mask;
    if (defect_ == Defect::flip_causal) {
      mask.kind = mask.kind == MaskKind::causal_top_left ? MaskKind::causal_bottom_right : MaskKind::causal_top_left;
    }
    const Tensor& q = c.received.core_inputs.q;
    const Tensor k = c.k8 ? dequantize(*c.k8) : c.received.core_inputs.k;
    const Tensor v = c.v8 ? dequantize(*c.v8) : c.received.core_inputs.v;
    r.out = Tensor({s.batch, s.q_heads, s.q_len, s.value_dim});
    for (std::int64_t b = 0; b < s.batch; ++b)
      for (std::int64_t h = 0; h < s.q_heads; ++h)
        for (std::int64_t i = 0; i < s.q_len; ++i) {
          const std::int64_t g = defect_ == Defect::wrong_head ? (kv_head_of(s, h) + 1) % s.kv_heads : kv_head_of(s, h);
          std::vector<double> z(static_cast<std::size_t>(s.kv_len), -INFINITY);
          double m = -INFINITY;
          for (std::int64_t j = 0; j < s.kv_len; ++j) {
            bool vis = mask.visible(s, b, h, i, j);
            // The leak: the first masked key after a visible one is attended too.
            if (defect_ == Defect::leak_next_key && !vis && j > 0 && mask.visible(s, b, h, i, j - 1)) vis = true;
            if (!vis) continue;
            double dot = 0;
            for (std::int64_t d = 0; d < s.key_dim; ++d) dot += q.at(b, h, i, d) * k.at(b, g, j, d);
            z[static_cast<std::size_t>(j)] = c.received.core.scale * dot + mask.bias_at(b, h, i, j);
            m = std::max(m, z[static_cast<std::size_t>(j)]);
          }
          for (std::int64_t d = 0; d < s.value_dim; ++d) {
            if (m == -INFINITY) {
              r.out.at(b, h, i, d) = defect_ == Defect::nan_masked_rows ? kNaN : 0.0;
              continue;
            }
            double num = 0, den = 0;
            for (std::int64_t j = 0; j < s.kv_len; ++j) {
              if (z[static_cast<std::size_t>(j)] == -INFINITY) continue;
              const double e = std::exp(z[static_cast<std::size_t>(j)] - m);
              num += e * v.at(b, g, j, d);
              den += e;
            }
            if (defect_ == Defect::faint_leak)
              for (std::int64_t j = 0; j < s.kv_len; ++j)
                if (!mask.visible(s, b, h, i, j)) num += 0x1p-36 * den * v.at(b, g, j, d);
            r.out.at(b, h, i, d) = static_cast<float>(num / den);
          }
        }
    if ((defect_ == Defect::nondeterministic && calls_ % 2 == 0) ||
        (defect_ == Defect::nondeterministic_rarely && calls_ % 3 == 0)) {
      r.out.values[1] = std::nextafter(static_cast<float>(r.out.values[1]), 10.0f);
    }
    if (defect_ == Defect::inf_first) r.out.values[0] = INFINITY;
    if (defect_ == Defect::jitter_when_poisoned && s.kv_heads > 1) {
      bool poisoned = false;
      for (std::int64_t j = 0; j < s.kv_len; ++j)
        for (std::int64_t d = 0; d < s.value_dim; ++d) poisoned = poisoned || std::fabs(v.at(0, 1, j, d)) > 100;
      if (poisoned) r.out.values[1] = std::nextafter(static_cast<float>(r.out.values[1]), 10.0f);
    }
    return r;
  }

 private:
  KernelDeclaration decl_;
  Defect defect_;
  RunStatus status_;
  int calls_ = 0;
};

Tensor gaussian(std::vector<std::int64_t> shape, std::mt19937_64& gen) {
  Tensor t(std::move(shape));
  std::normal_distribution<double> n(0.0, 1.0);
  for (double& x : t.values) x = static_cast<float>(n(gen));
  return t;
}

Case core_case(CoreShape s, Mask m, std::uint64_t seed) {
  std::mt19937_64 gen(seed);
  Case c;
  c.name = "faults_test_" + std::to_string(seed);
  c.core.shape = s;
  c.core.scale = 0.5f;
  c.core.mask = std::move(m);
  c.core_inputs.q = gaussian({s.batch, s.q_heads, s.q_len, s.key_dim}, gen);
  c.core_inputs.k = gaussian({s.batch, s.kv_heads, s.kv_len, s.key_dim}, gen);
  c.core_inputs.v = gaussian({s.batch, s.kv_heads, s.kv_len, s.value_dim}, gen);
  return c;
}

Mask mask_of(MaskKind k) {
  Mask m;
  m.kind = k;
  return m;
}

Mask padding(std::vector<std::int64_t> lengths) {
  Mask m;
  m.kind = MaskKind::key_padding;
  m.key_lengths = std::move(lengths);
  return m;
}

// B = 2, GQA 2:1, key padding 6 and 4 of 9 keys.
Case padding_case() { return core_case({2, 2, 1, 5, 9, 4, 3}, padding({6, 4}), 1); }

struct Outcome {
  CaseFaults faults;
  KernelRun first;
  CoreReference ref;
};

// The leak probes poison the case in place (faults.h): every value and code
// must come back bit for bit, whichever way detect_faults returned.
void expect_restored(const ReceivedCase& before, const ReceivedCase& after) {
  const CoreInputs &x = before.received.core_inputs, &y = after.received.core_inputs;
  EXPECT_TRUE(bit_identical(x.q, y.q) && bit_identical(x.k, y.k) && bit_identical(x.v, y.v));
  EXPECT_TRUE(bit_identical(before.received.block_inputs.x_kv, after.received.block_inputs.x_kv));
  for (auto m : {&ReceivedCase::k8, &ReceivedCase::v8}) {
    ASSERT_EQ((before.*m).has_value(), (after.*m).has_value());
    if ((before.*m).has_value()) {
      EXPECT_EQ((before.*m)->codes, (after.*m)->codes);
    }
  }
  EXPECT_TRUE(after.poisoned_pages.empty());
}

Outcome judge(TestKernel& k, const Case& c, const DetectorOptions& opt = {}) {
  ReceivedCase rc = receive(c, k.declaration());
  const ReceivedCase before = rc;
  Outcome o;
  o.first = k.run(rc, RunOptions{});
  o.ref = reference_core(rc.received.core, rc.received.core_inputs);
  o.faults = detect_faults(k, rc, o.first, o.ref, opt);
  expect_restored(before, rc);
  return o;
}

std::string classes(const CaseFaults& f) {
  std::string t;
  for (const Fault& x : f.faults) t += std::string(fault_class_name(x.kind)) + ": " + x.detail + "\n";
  return t;
}

void expect_only(const CaseFaults& f, FaultClass c) {
  ASSERT_EQ(f.faults.size(), 1u) << classes(f);
  EXPECT_EQ(f.faults[0].kind, c) << classes(f);
}

std::vector<Case> varied_cases() {
  std::vector<Case> cases;
  cases.push_back(padding_case());
  cases.push_back(core_case({1, 2, 2, 8, 8, 5, 4}, mask_of(MaskKind::causal_top_left), 2));
  cases.push_back(core_case({1, 1, 1, 4, 7, 3, 2}, mask_of(MaskKind::causal_bottom_right), 3));
  cases.push_back(core_case({1, 1, 1, 7, 4, 3, 2}, mask_of(MaskKind::causal_top_left), 4));
  cases.push_back(core_case({1, 1, 1, 7, 4, 3, 2}, mask_of(MaskKind::causal_bottom_right), 5));
  cases.push_back(core_case({2, 1, 1, 3, 5, 2, 2}, padding({0, 5}), 6));  // batch 0 fully masked
  Mask dense;
  dense.kind = MaskKind::dense;
  dense.allowed = Tensor({1, 2, 4, 6});
  std::mt19937_64 gen(9);
  for (double& a : dense.allowed.values) a = (gen() % 3) != 0 ? 1.0 : 0.0;
  for (std::int64_t j = 0; j < 6; ++j) dense.allowed.at(0, 1, 2, j) = 0.0;  // one fully masked row
  cases.push_back(core_case({1, 2, 1, 4, 6, 3, 2}, dense, 7));
  Mask bias;
  bias.kind = MaskKind::bias;
  bias.bias = Tensor({1, 1, 3, 5});
  for (double& x : bias.bias.values) x = (gen() % 4) == 0 ? -INFINITY : static_cast<float>((gen() % 100) / 50.0);
  cases.push_back(core_case({1, 1, 1, 3, 5, 2, 3}, bias, 8));
  cases.push_back(core_case({1, 1, 1, 3, 5, 2, 3}, mask_of(MaskKind::none), 10));
  return cases;
}

TEST(Detectors, SoundKernelIsCaughtByNone) {
  for (const Case& c : varied_cases()) {
    TestKernel k(Defect::none);
    const Outcome o = judge(k, c);
    EXPECT_TRUE(o.faults.faults.empty()) << c.name << "\n" << classes(o.faults);
    EXPECT_GT(o.faults.runs, 0) << c.name;  // the detectors did re-run it
  }
}

TEST(Detectors, LeakedKeyIsMaskLeakWithKeyAndMass) {
  TestKernel k(Defect::leak_next_key);
  const Case c = padding_case();
  const Outcome o = judge(k, c);
  expect_only(o.faults, FaultClass::mask_leak);
  const Fault& f = o.faults.faults[0];
  // The first leaking row is (b=0, h=0, i=0) and its key j = 6 (length 6).
  EXPECT_EQ(f.where, (std::vector<std::int64_t>{0, 0, 0, 6})) << f.detail;
  // The true leaked weight of key 6 in each row of batch 0, as the kernel computes it.
  const ReceivedCase rc = receive(c, k.declaration());
  const CoreShape& s = c.core.shape;
  double most = 0;
  for (std::int64_t h = 0; h < s.q_heads; ++h)
    for (std::int64_t i = 0; i < s.q_len; ++i) {
      std::vector<double> z;
      for (std::int64_t j = 0; j <= 6; ++j) {
        double dot = 0;
        for (std::int64_t d = 0; d < s.key_dim; ++d)
          dot += rc.received.core_inputs.q.at(0, h, i, d) * rc.received.core_inputs.k.at(0, 0, j, d);
        z.push_back(0.5 * dot);
      }
      double den = 0;
      for (double x : z) den += std::exp(x);
      most = std::max(most, std::exp(z[6]) / den);
    }
  // A certified lower bound (faults.h): never above the true weight, and near
  // it because the poison is 2^8 times the largest |v|.
  EXPECT_LE(f.leaked_mass, most * (1 + 1e-6)) << f.detail;
  EXPECT_GE(f.leaked_mass, most * 0.95) << f.detail;
}

TEST(Detectors, CausalOffByOneIsMaskLeakAtTheNextKey) {
  TestKernel k(Defect::leak_next_key);
  const Outcome o = judge(k, core_case({1, 2, 2, 8, 8, 5, 4}, mask_of(MaskKind::causal_top_left), 2));
  expect_only(o.faults, FaultClass::mask_leak);
  EXPECT_EQ(o.faults.faults[0].where, (std::vector<std::int64_t>{0, 0, 0, 1})) << o.faults.faults[0].detail;
}

TEST(Detectors, DenseMaskLeakIsFound) {
  TestKernel k(Defect::leak_next_key);
  const Outcome o = judge(k, varied_cases()[6]);
  expect_only(o.faults, FaultClass::mask_leak);
}

TEST(Detectors, Int8CodesArePoisoned) {
  // The kernel reads only the codes: a leak is visible only if the codes change.
  TestKernel leaky(Defect::leak_next_key, Format::int8);
  expect_only(judge(leaky, padding_case()).faults, FaultClass::mask_leak);
  TestKernel sound(Defect::none, Format::int8);
  const Outcome o = judge(sound, padding_case());
  EXPECT_TRUE(o.faults.faults.empty()) << classes(o.faults);
}

TEST(Detectors, CounterDrivenKernelIsNondeterministic) {
  TestKernel k(Defect::nondeterministic);
  const Outcome o = judge(k, padding_case());
  expect_only(o.faults, FaultClass::nondeterministic);
  EXPECT_EQ(o.faults.faults[0].where, (std::vector<std::int64_t>{0, 0, 0, 1}));
  EXPECT_EQ(o.faults.faults[0].count, 1);
  ASSERT_FALSE(o.faults.notes.empty());  // the leak probe is skipped, and says so
}

TEST(Detectors, NondeterminismTheDeterminismRunsMissIsNoMaskLeak) {
  // Call 1 is the first run, call 2 the one determinism run (both alike); call 3,
  // the first leak probe, differs by chance. The probe's repeat tells it apart.
  DetectorOptions opt;
  opt.determinism_runs = 2;
  TestKernel k(Defect::nondeterministic_rarely);
  const Outcome o = judge(k, padding_case(), opt);
  expect_only(o.faults, FaultClass::nondeterministic);
  EXPECT_NE(o.faults.faults[0].detail.find("identical calls gave different outputs"), std::string::npos)
      << classes(o.faults);
}

// A dense mask of shape [1, 2, 4, 6] giving two kv heads disjoint keys: head 0
// sees keys 0-2, head 1 keys 3-5 (for the grouped-head order probe).
Mask heads_apart_mask() {
  Mask dense;
  dense.kind = MaskKind::dense;
  dense.allowed = Tensor({1, 2, 4, 6});
  for (std::int64_t i = 0; i < 4; ++i)
    for (std::int64_t j = 0; j < 6; ++j) {
      dense.allowed.at(0, 0, i, j) = j < 3 ? 1.0 : 0.0;
      dense.allowed.at(0, 1, i, j) = j >= 3 ? 1.0 : 0.0;
    }
  return dense;
}

TEST(Detectors, WrongHeadReadIsConventionNotMaskLeak) {
  // Two kv heads with different dense masks: head 0 reading kv head 1 sees the
  // keys poisoned for head 1, which head 0 may see.
  const Mask dense = heads_apart_mask();
  TestKernel k(Defect::wrong_head);
  const Outcome o = judge(k, core_case({1, 2, 2, 4, 6, 3, 2}, dense, 11));
  for (const Fault& f : o.faults.faults) EXPECT_NE(f.kind, FaultClass::mask_leak) << classes(o.faults);
  const Fault* f = o.faults.find(FaultClass::convention);
  ASSERT_NE(f, nullptr) << classes(o.faults);
  EXPECT_NE(f->detail.find("reads the K/V of another head"), std::string::npos) << f->detail;
  EXPECT_NE(f->detail.find("moves with kv head 1's keys"), std::string::npos) << f->detail;
  // The same case on a sound kernel: no fault.
  TestKernel sound(Defect::none);
  EXPECT_TRUE(judge(sound, core_case({1, 2, 2, 4, 6, 3, 2}, dense, 11)).faults.faults.empty());
}

TEST(Detectors, JitterThatCoincidesWithOtherHeadsPoisonIsNoConvention) {
  // Head 0's row moves (one ulp) when kv head 1's keys are poisoned, and not
  // when its own are: the pattern of a row reading another head, but by a
  // rounding-sized amount that does not grow with the poison. Before the
  // growth rule the probe called this a grouped-head convention fault, and
  // racy_reduction's jitter a convention fault or a mask leak of mass ~6e-11
  // (4 runs in 60 of the quick gaussian suite).
  const Mask dense = heads_apart_mask();
  TestKernel k(Defect::jitter_when_poisoned);
  const Outcome o = judge(k, core_case({1, 2, 2, 4, 6, 3, 2}, dense, 11));
  EXPECT_TRUE(o.faults.faults.empty()) << classes(o.faults);
  bool noted = false;
  for (const std::string& n : o.faults.notes) noted = noted || n.find("read as rounding jitter") != std::string::npos;
  EXPECT_TRUE(noted);
}

TEST(Detectors, AnUlpSizedLeakThatGrowsWithThePoisonIsALeak) {
  // Leaked mass 2^-36 per key: with the poison 2^8 above max|V| the row moves
  // by about an ulp, the size of the jitter the growth rule sets aside; with
  // a 2^16 times larger poison it moves 2^16 times as far, so it counts.
  TestKernel k(Defect::faint_leak);
  const Outcome o = judge(k, padding_case());
  ASSERT_EQ(o.faults.faults.size(), 1u) << classes(o.faults);
  EXPECT_EQ(o.faults.faults[0].kind, FaultClass::mask_leak) << classes(o.faults);
}

TEST(Detectors, NeverWrittenElementsHaveTheirOwnMessage) {
  TestKernel k(Defect::none);
  const Case c = padding_case();
  const ReceivedCase rc = receive(c, k.declaration());
  KernelRun run = k.run(rc, RunOptions{});
  const CoreReference ref = reference_core(rc.received.core, rc.received.core_inputs);
  run.out.values[4] = run.out.values[5] = kNaN;  // what the attach layer's fill reads as
  run.unwritten = 2;
  run.first_unwritten = 4;
  const auto f = detect_non_finite(run, ref);
  ASSERT_TRUE(f);
  EXPECT_EQ(f->detail.rfind("2 output element(s) never written by the kernel", 0), 0u) << f->detail;
  EXPECT_NE(f->detail.find("first at [0,0,1,1]"), std::string::npos) << f->detail;
  run.unwritten = 0;  // the same NaNs computed by the kernel: the usual message
  EXPECT_EQ(detect_non_finite(run, ref)->detail.find("never written"), std::string::npos);
}

// A kernel through the C ABI whose answer depends on how often it was called
// in this process (a static call counter choosing a split count): each call
// in a fresh process gives the same bits, two calls in one process do not.
std::int32_t counts_its_calls(const hr_core_problem* p) {
  static int calls = 0;
  ++calls;
  auto* o = static_cast<float*>(p->o.data);
  const std::int64_t n = p->o.extents[0] * p->o.extents[1] * p->o.extents[2] * p->o.extents[3];
  for (std::int64_t i = 0; i < n; ++i) o[i] = 0.25f;
  o[0] = calls % 2 == 1 ? 0.25f : 0.25f + 0x1p-20f;  // "split 2" rounds differently
  return HR_OK;
}

TEST(Detectors, StateKeptBetweenCallsIsNondeterministicUnderIsolation) {
  hr_kernel abi{};
  abi.abi_version = HEADROOM_ABI_VERSION;
  abi.name = "counts_its_calls";
  abi.description = "test kernel";
  abi.level = HR_LEVEL_CORE;
  abi.input_format = HR_FORMAT_FLOAT32;
  abi.output_format = HR_FORMAT_FLOAT32;
  abi.mask_kinds = HR_MASK_NONE;
  abi.masked_row = HR_MASKED_ROW_ZEROS;
  abi.layouts = HR_LAYOUT_BHTD;
  abi.run_core = counts_its_calls;
  auto k = attach_in_process(&abi);
  const ReceivedCase rc = receive(core_case({1, 1, 1, 2, 3, 2, 2}, mask_of(MaskKind::none), 9), k->declaration());
  RunOptions isolated;
  const KernelRun first = k->run(rc, isolated);
  ASSERT_EQ(first.status, RunStatus::ok) << first.detail;
  // Every isolated call starts from the state of headroom's copy: a second
  // lone call agrees bit for bit, so only calls made in one process show it.
  const KernelRun alone = k->run(rc, isolated);
  ASSERT_EQ(alone.status, RunStatus::ok);
  EXPECT_EQ(alone.out.values, first.out.values);
  int calls = 0;
  const auto f = detect_nondeterminism(*k, rc, first, 3, isolated, &calls);
  ASSERT_TRUE(f.has_value()) << "a call counter kept between calls went unseen";
  EXPECT_EQ(f->kind, FaultClass::nondeterministic);
  EXPECT_NE(f->detail.find("in run 3 (made in the same process right after run 2)"), std::string::npos) << f->detail;
  EXPECT_EQ(calls, 2);
}

TEST(Detectors, NaNOnMaskedRowsDeclaredZerosIsConvention) {
  TestKernel k(Defect::nan_masked_rows);
  const Outcome o = judge(k, core_case({2, 1, 1, 3, 5, 2, 2}, padding({0, 5}), 6));
  expect_only(o.faults, FaultClass::convention);
  EXPECT_EQ(o.faults.faults[0].count, 3);  // the three rows of batch 0
  EXPECT_EQ(o.faults.faults[0].where, (std::vector<std::int64_t>{0, 0, 0, 0}));
}

TEST(Detectors, FlippedCausalAlignmentIsConventionOnly) {
  // Tq < Tk, declared bottom-right, computed top-left: fewer keys seen, no leak.
  // Tq > Tk, declared top-left, computed bottom-right: the first rows come out zero.
  // Tq > Tk, declared bottom-right, computed top-left: masked rows get values and
  // masked keys are read — one convention fault explains both.
  for (const Case& c : {varied_cases()[2], varied_cases()[3], varied_cases()[4]}) {
    TestKernel k(Defect::flip_causal);
    const Outcome o = judge(k, c);
    expect_only(o.faults, FaultClass::convention);
    EXPECT_NE(o.faults.faults[0].detail.find("causal alignment opposite"), std::string::npos) << o.faults.faults[0].detail;
  }
  // Square: the alignments agree, nothing to find.
  TestKernel k(Defect::flip_causal);
  EXPECT_TRUE(judge(k, varied_cases()[1]).faults.faults.empty());
}

TEST(Detectors, NonFiniteOutputIsNonFiniteOnly) {
  TestKernel k(Defect::inf_first);
  const Outcome o = judge(k, padding_case());
  expect_only(o.faults, FaultClass::non_finite);
  EXPECT_EQ(o.faults.faults[0].count, 1);
  EXPECT_EQ(o.faults.faults[0].where, (std::vector<std::int64_t>{0, 0, 0, 0}));
}

TEST(Detectors, IsolationStatusesMapToTheirClasses) {
  for (auto [status, cls] : {std::pair{RunStatus::crash, FaultClass::crash}, std::pair{RunStatus::oob_read, FaultClass::oob_read},
                             std::pair{RunStatus::oob_write, FaultClass::oob_write},
                             std::pair{RunStatus::timeout, FaultClass::timeout}}) {
    TestKernel k(Defect::none, Format::float32, status);
    const Outcome o = judge(k, padding_case());
    expect_only(o.faults, cls);
    EXPECT_EQ(o.faults.runs, 0);  // nothing to re-run without an output
  }
  TestKernel declined(Defect::none, Format::float32, RunStatus::unsupported);
  const Outcome u = judge(declined, padding_case());
  EXPECT_TRUE(u.faults.faults.empty());
  EXPECT_EQ(u.faults.unsupported_runs, 1);
  TestKernel bad(Defect::none, Format::float32, RunStatus::bad_output);
  const Outcome o = judge(bad, padding_case());
  EXPECT_EQ(o.faults.bad_output_runs, 1);
  EXPECT_EQ(o.faults.bad_output_detail, "test status");  // the attach layer's detail, kept
}

// Block level: Y[b, i, m] = Σ over visible keys j of X_kv[b, j, m] — not attention, but
// it reads X_kv exactly where attention would, which is all the leak probe looks at.
class BlockSumKernel : public AttachedKernel {
 public:
  explicit BlockSumKernel(bool leaky) : leaky_(leaky) {
    decl_.name = "block_sum";
    decl_.level = Level::block;
    decl_.mask_kinds = 0x3F;
  }
  const KernelDeclaration& declaration() const override { return decl_; }
  KernelRun run(const ReceivedCase& c, const RunOptions&) override {
    const BlockShape& s = c.received.block.shape;
    const CoreShape cs = s.core();
    const Mask& m = c.received.block.mask;
    KernelRun r;
    r.out = Tensor({s.batch, s.q_len, s.model_dim});
    for (std::int64_t b = 0; b < s.batch; ++b)
      for (std::int64_t i = 0; i < s.q_len; ++i)
        for (std::int64_t j = 0; j < s.kv_len; ++j) {
          // The leak: key padding's first masked key is read as well.
          const bool vis = m.visible(cs, b, 0, i, j) || (leaky_ && j == m.key_lengths[static_cast<std::size_t>(b)]);
          if (!vis) continue;
          for (std::int64_t d = 0; d < s.model_dim; ++d) r.out.at(b, i, d) += c.received.block_inputs.x_kv.at(b, j, d);
        }
    return r;
  }

 private:
  KernelDeclaration decl_;
  bool leaky_;
};

TEST(Detectors, BlockLevelLeakIsFoundThroughXkv) {
  std::mt19937_64 gen(3);
  Case c;
  c.name = "block_leak";
  c.level = Level::block;
  c.block.shape = BlockShape{2, 3, 6, 4, 2, 1, 2, 2};
  c.block.mask = padding({4, 6});
  BlockInputs& in = c.block_inputs;
  in.x_q = gaussian({2, 3, 4}, gen);
  in.x_kv = gaussian({2, 6, 4}, gen);
  in.w_q = gaussian({4, 4}, gen);
  in.w_k = gaussian({4, 2}, gen);
  in.w_v = gaussian({4, 2}, gen);
  in.w_o = gaussian({4, 4}, gen);
  for (bool leaky : {false, true}) {
    BlockSumKernel k(leaky);
    ReceivedCase rc = receive(c, k.declaration());
    const ReceivedCase before = rc;
    const KernelRun first = k.run(rc, RunOptions{});
    const std::optional<Fault> f = detect_mask_leak(k, rc, first, DetectorOptions{});
    expect_restored(before, rc);
    ASSERT_EQ(f.has_value(), leaky);
    if (leaky) {
      EXPECT_EQ(f->kind, FaultClass::mask_leak);
      EXPECT_EQ(f->where, (std::vector<std::int64_t>{0, 0, 4})) << f->detail;  // (b, i, j)
      EXPECT_EQ(f->count, 3);  // the three queries of batch 0 (batch 1 has no masked key)
    }
  }
}

TEST(FaultClassNames, RoundTripAndStatusMapping) {
  for (FaultClass c : kAllFaultClasses) EXPECT_EQ(parse_fault_class(fault_class_name(c)), c);
  EXPECT_EQ(fault_class_name(FaultClass::mask_leak), "mask_leak");
  EXPECT_FALSE(parse_fault_class("bad_output"));
  EXPECT_FALSE(fault_of(RunStatus::ok));
  EXPECT_FALSE(fault_of(RunStatus::unsupported));
  EXPECT_FALSE(fault_of(RunStatus::bad_output));
}

}  // namespace
}  // namespace headroom
