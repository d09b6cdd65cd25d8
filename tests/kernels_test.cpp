// headroom — tests of the table of bundled kernels and of every sound kernel,
// each called directly through its hr_kernel on small hand-built problems and
// compared with a double-precision attention (tests/kernels_support.h).
//
// Tolerances are on |o − o*| / Σ_j p_j|v_j| (the scaled error of DESIGN.md,
// without the u_F): float32 1e-5, binary16 1e-2, bfloat16 3e-2, int8 5e-2 —
// a few times the error each kernel's header derives for these sizes, small
// enough that an indexing or mask mistake (an error of order 1) cannot pass.
#include <gtest/gtest.h>

#include <cmath>
#include <cstdio>
#include <cstring>
#include <set>
#include <string>

#include "kernels_support.h"

namespace {

using kt::Layout;
using kt::Shape;

const char* mask_name(std::uint32_t kind) {
  switch (kind) {
    case HR_MASK_NONE:
      return "none";
    case HR_MASK_CAUSAL_TOP_LEFT:
      return "causal_top_left";
    case HR_MASK_CAUSAL_BOTTOM_RIGHT:
      return "causal_bottom_right";
    case HR_MASK_KEY_PADDING:
      return "key_padding";
    case HR_MASK_DENSE:
      return "dense";
    default:
      return "bias";
  }
}

const std::uint32_t kMasks[] = {HR_MASK_NONE,        HR_MASK_CAUSAL_TOP_LEFT, HR_MASK_CAUSAL_BOTTOM_RIGHT,
                                HR_MASK_KEY_PADDING, HR_MASK_DENSE,           HR_MASK_BIAS};

const Shape kShapes[] = {
    {2, 4, 2, 5, 37, 12, 7},    // Tq < Tk (the causal alignments differ), grouped heads, odd dims, 37 = 2·16 + 5
    {1, 2, 1, 40, 37, 8, 5},    // Tq > Tk: bottom-right leaves rows 0..2 fully masked
    {1, 1, 1, 19, 70, 16, 16},  // one 64-tile and a tail of 6
    {1, 4, 1, 6, 20, 8, 8},     // multi-query: one K/V head for four query heads
};

struct SoundCase {
  const char* name;
  std::int32_t format;
  double tol;
};
void PrintTo(const SoundCase& c, std::ostream* os) { *os << c.name; }

const SoundCase kSound[] = {
    {"f32_textbook", HR_FORMAT_FLOAT32, 1e-5}, {"f32_tiled_16", HR_FORMAT_FLOAT32, 1e-5},
    {"f32_tiled_64", HR_FORMAT_FLOAT32, 1e-5}, {"gqa_f32", HR_FORMAT_FLOAT32, 1e-5},
    {"f16_f32acc", HR_FORMAT_BINARY16, 1e-2},  {"f16_f16acc", HR_FORMAT_BINARY16, 1e-2},
    {"bf16_f32acc", HR_FORMAT_BFLOAT16, 3e-2}, {"i8_tokenwise", HR_FORMAT_INT8, 5e-2},
    {"e4m3_blockwise_rotated", HR_FORMAT_FLOAT32, 0.25},
};

class SoundKernel : public testing::TestWithParam<SoundCase> {
 protected:
  const hr_kernel& kernel() {
    const hr_kernel* k = kt::find_kernel(GetParam().name);
    if (k == nullptr) throw std::runtime_error(std::string("no bundled kernel ") + GetParam().name);
    return *k;
  }
};

TEST_P(SoundKernel, MatchesDoubleReferenceUnderEveryMask) {
  const SoundCase& c = GetParam();
  const hr_kernel& k = kernel();
  for (std::uint32_t mask : kMasks) {
    double worst = 0.0, worst_lse = 0.0;
    int masked_rows = 0;
    for (std::size_t n = 0; n < std::size(kShapes); ++n) {
      kt::Problem p = kt::make_problem(kShapes[n], c.format, 100 + n);
      kt::set_mask(p, mask, 200 + n);
      const kt::Reference r = kt::reference(p);
      const kt::Output out = kt::run(k, p);
      ASSERT_EQ(out.rc, HR_OK) << mask_name(mask) << " shape " << n;
      EXPECT_TRUE(out.intact) << "wrote outside O or lse: " << mask_name(mask) << " shape " << n;
      const kt::Score s = kt::score(p, r, out);
      EXPECT_LE(s.worst, c.tol) << mask_name(mask) << " shape " << n << ", worst at " << s.where;
      if (k.returns_lse) {
        EXPECT_LE(s.worst_lse, c.tol) << mask_name(mask) << " shape " << n;
      }
      EXPECT_EQ(s.bad_masked_rows, 0) << "fully masked rows not zeros/-inf: " << mask_name(mask) << " shape " << n;
      worst = std::max(worst, s.worst);
      worst_lse = std::max(worst_lse, s.worst_lse);
      for (char m : r.masked) masked_rows += m;
    }
    // Every kind but none and top-left causal has fully masked rows in these problems.
    if (mask != HR_MASK_NONE && mask != HR_MASK_CAUSAL_TOP_LEFT) {
      EXPECT_GT(masked_rows, 0) << mask_name(mask);
    }
    std::printf("%-13s mask=%-19s worst |o-o*|/sum p|v| = %.3g (tol %.0e), lse %.3g, fully masked rows %d\n", c.name,
                mask_name(mask), worst, c.tol, worst_lse, masked_rows);
  }
}

// The strides say where each element is; the arithmetic must not depend on
// them, so BTHD and padded rows give the very same bits, and row padding
// (filled with NaN) is neither read nor written.
TEST_P(SoundKernel, EveryLayoutGivesTheSameBits) {
  const hr_kernel& k = kernel();
  kt::Problem p = kt::make_problem(kShapes[0], GetParam().format, 7);
  kt::set_mask(p, HR_MASK_KEY_PADDING, 8);
  const kt::Output base = kt::run(k, p, Layout::bhtd);
  ASSERT_EQ(base.rc, HR_OK);
  for (Layout layout : {Layout::bthd, Layout::bhtd_padded}) {
    const kt::Output other = kt::run(k, p, layout);
    ASSERT_EQ(other.rc, HR_OK);
    EXPECT_TRUE(other.intact);
    EXPECT_EQ(other.raw, base.raw) << "layout " << static_cast<int>(layout);
  }
}

// DESIGN.md's mask_leak check, applied directly: NaN in every K/V row no
// query can see must leave every output bit as it was.
TEST_P(SoundKernel, MaskedKeysCannotReachTheOutput) {
  const hr_kernel& k = kernel();
  for (std::uint32_t mask : {HR_MASK_CAUSAL_TOP_LEFT, HR_MASK_KEY_PADDING, HR_MASK_DENSE}) {
    kt::Problem p = kt::make_problem(kShapes[0], GetParam().format, 11);
    kt::set_mask(p, mask, 12);
    const kt::Problem bad = kt::poisoned(p);
    std::size_t nans = 0;
    for (double x : bad.v) nans += std::isnan(x) ? 1 : 0;
    ASSERT_GT(nans, 0u) << mask_name(mask) << ": nothing to poison";
    const kt::Output a = kt::run(k, p), b = kt::run(k, bad);
    ASSERT_EQ(a.rc, HR_OK);
    ASSERT_EQ(b.rc, HR_OK);
    EXPECT_EQ(a.raw, b.raw) << mask_name(mask);
    EXPECT_EQ(std::memcmp(a.lse.data(), b.lse.data(), a.lse.size() * sizeof(float)), 0) << mask_name(mask);
  }
}

TEST_P(SoundKernel, DeclinesAFormatItDidNotDeclare) {
  const std::int32_t other = GetParam().format == HR_FORMAT_FLOAT32 ? HR_FORMAT_BINARY16 : HR_FORMAT_FLOAT32;
  const kt::Problem p = kt::make_problem(kShapes[0], other, 3);
  EXPECT_EQ(kt::run(kernel(), p).rc, HR_UNSUPPORTED);
}

INSTANTIATE_TEST_SUITE_P(Bundled, SoundKernel, testing::ValuesIn(kSound),
                         [](const testing::TestParamInfo<SoundCase>& i) { return std::string(i.param.name); });

TEST(I8Tokenwise, DeclinesKeysPastItsInt32Range) {
  const hr_kernel* k = kt::find_kernel("i8_tokenwise");
  ASSERT_NE(k, nullptr);
  EXPECT_EQ(k->max_kv_len, 65536);  // 65536·255·127 < 2^31
  hr_core_problem p{};
  p.batch = p.q_heads = p.kv_heads = p.q_len = p.key_dim = p.value_dim = 1;
  p.kv_len = k->max_kv_len + 1;
  p.q.format = p.k.format = p.v.format = HR_FORMAT_INT8;
  p.o.format = HR_FORMAT_FLOAT32;
  p.mask.kind = HR_MASK_NONE;
  EXPECT_EQ(k->run_core(&p), HR_UNSUPPORTED);  // declines before touching any data (all NULL here)
}

// ---- the multi-head block ----

TEST(BlockF32, MatchesDoubleReference) {
  const hr_kernel* k = kt::find_kernel("block_f32");
  ASSERT_NE(k, nullptr);
  double worst = 0.0;
  for (std::int64_t kv_heads : {4, 2}) {
    for (std::uint32_t mask : {HR_MASK_NONE, HR_MASK_CAUSAL_BOTTOM_RIGHT, HR_MASK_KEY_PADDING, HR_MASK_BIAS}) {
      kt::BlockProblem p = kt::make_block(2, 5, 9, 32, 4, kv_heads, 8, 40 + kv_heads);
      kt::set_mask(p.attention, mask, 41);
      const kt::BlockReference r = kt::block_reference(p);
      std::int32_t rc = -1;
      const std::vector<double> y = kt::run_block(*k, p, &rc);
      ASSERT_EQ(rc, HR_OK);
      for (std::size_t e = 0; e < y.size(); ++e) {
        const double err = std::fabs(y[e] - r.y[e]) / r.magnitude[e];
        EXPECT_LE(err, 1e-5) << mask_name(mask) << " Hkv " << kv_heads << " element " << e;
        worst = std::max(worst, std::isnan(err) ? INFINITY : err);
      }
      if (mask == HR_MASK_KEY_PADDING) {  // batch 1 has length 0: its rows attend to nothing, Y = b_o
        for (std::int64_t e = 5 * 32; e < 10 * 32; ++e) EXPECT_EQ(y[e], p.b_o[e % 32]) << e;
      }
    }
  }
  std::printf("block_f32 worst |y-y*|/magnitude = %.3g (tol 1e-05)\n", worst);
}

// ---- the table ----

const std::set<std::string> kFaultClasses = {"non_finite",       "mask_leak", "oob_read", "oob_write", "convention",
                                             "nondeterministic", "crash",     "timeout",  "error",
                                             "wrong_group_sum",  "masked_key_gradient", "split_merge"};

TEST(BundledTable, NamesAreUniqueAndWellFormed) {
  std::size_t n = 0;
  const hr_bundled_kernel* t = headroom_bundled_kernels(&n);
  ASSERT_GT(n, 0u);
  EXPECT_EQ(t[n].kernel, nullptr);  // the sentinel
  std::set<std::string> names;
  for (std::size_t i = 0; i < n; ++i) {
    const std::string name = t[i].kernel->name;
    EXPECT_TRUE(names.insert(name).second) << "duplicate " << name;
    EXPECT_FALSE(name.empty());
    for (char ch : name) EXPECT_TRUE((ch >= 'a' && ch <= 'z') || (ch >= '0' && ch <= '9') || ch == '_') << name;
  }
}

TEST(BundledTable, SoundKernelsHaveNoFaultAndSpecimensHaveOne) {
  std::size_t n = 0;
  const hr_bundled_kernel* t = headroom_bundled_kernels(&n);
  int specimens = 0;
  for (std::size_t i = 0; i < n; ++i) {
    const std::string name = t[i].kernel->name;
    if (t[i].flawed == 0) {
      EXPECT_EQ(t[i].expected_fault, nullptr) << name;
      EXPECT_EQ(t[i].defect, nullptr) << name;
      continue;
    }
    ++specimens;
    EXPECT_EQ(t[i].flawed, 1) << name;
    ASSERT_NE(t[i].expected_fault, nullptr) << name;
    ASSERT_NE(t[i].defect, nullptr) << name;
    EXPECT_TRUE(kFaultClasses.count(t[i].expected_fault)) << name << ": " << t[i].expected_fault;
    EXPECT_GT(std::strlen(t[i].defect), 10u) << name;
  }
  EXPECT_EQ(specimens, 27);
}

TEST(BundledTable, HoldsEveryKernelWithItsExpectedFault) {
  const std::pair<const char*, const char*> expected[] = {
      {"f32_textbook", nullptr},
      {"f32_tiled_16", nullptr},
      {"f32_tiled_64", nullptr},
      {"f16_f32acc", nullptr},
      {"f16_f16acc", nullptr},
      {"bf16_f32acc", nullptr},
      {"i8_tokenwise", nullptr},
      {"block_f32", nullptr},
      {"gqa_f32", nullptr},
      {"e4m3_tensorwise", nullptr},
      {"e4m3_blockwise", nullptr},
      {"e4m3_blockwise_rotated", nullptr},
      {"f32_varlen", nullptr},
      {"no_max_shift", "non_finite"},
      {"mask_tail_off_by_one", "mask_leak"},
      {"nan_masked_rows", "convention"},
      {"causal_flipped", "convention"},
      {"oob_read_tail", "oob_read"},
      {"oob_write_row", "oob_write"},
      {"racy_reduction", "nondeterministic"},
      {"block_heads_swapped", "error"},
      {"hang_on_shape", "timeout"},
      {"crash_one_token", "crash"},
      {"f16_late_scale", "non_finite"},
      {"window_off_by_one", "mask_leak"},
      {"e4m3_overflow_nan", "non_finite"},
      {"e4m3_block_scale_shifted", "error"},
      {"e4m3_p_unscaled", "error"},
      {"f32_backward_tiled", nullptr},
      {"f16_backward_f32acc", nullptr},
      {"backward_d_dropped", "error"},
      {"backward_no_scale", "error"},
      {"backward_p_from_row_max", "error"},
      {"backward_group_not_summed", "wrong_group_sum"},
      {"backward_racy_dk", "nondeterministic"},
      {"backward_masked_keys", "masked_key_gradient"},
      {"softcap_after_mask", "mask_leak"},
      {"sink_dropped", "error"},
      {"lse_bf16_buffer", "error"},
      {"varlen_offset_off_by_one", "mask_leak"},
      {"f32_paged_split", nullptr},
      {"paged_last_page_whole", "mask_leak"},
      {"split_merge_unnormalised", "split_merge"},
  };
  std::size_t n = 0;
  const hr_bundled_kernel* t = headroom_bundled_kernels(&n);
  EXPECT_EQ(n, std::size(expected));
  for (const auto& [name, fault] : expected) {
    const hr_bundled_kernel* row = nullptr;
    for (std::size_t i = 0; i < n; ++i) {
      if (std::string(t[i].kernel->name) == name) row = &t[i];
    }
    ASSERT_NE(row, nullptr) << name;
    if (fault == nullptr) {
      EXPECT_EQ(row->expected_fault, nullptr) << name;
    } else {
      ASSERT_NE(row->expected_fault, nullptr) << name;
      EXPECT_STREQ(row->expected_fault, fault) << name;
    }
  }
}

TEST(BundledTable, DeclarationsAreConsistent) {
  std::size_t n = 0;
  const hr_bundled_kernel* t = headroom_bundled_kernels(&n);
  const std::uint32_t all = HR_MASK_NONE | HR_MASK_CAUSAL_TOP_LEFT | HR_MASK_CAUSAL_BOTTOM_RIGHT | HR_MASK_KEY_PADDING |
                            HR_MASK_DENSE | HR_MASK_BIAS;
  for (std::size_t i = 0; i < n; ++i) {
    const hr_kernel& k = *t[i].kernel;
    SCOPED_TRACE(k.name);
    EXPECT_EQ(k.abi_version, static_cast<std::uint32_t>(HEADROOM_ABI_VERSION));
    EXPECT_NE(std::strlen(k.description), 0u);
    EXPECT_EQ(k.level == HR_LEVEL_CORE, k.run_core != nullptr);
    EXPECT_EQ(k.level == HR_LEVEL_BLOCK, k.run_block != nullptr);
    EXPECT_NE(k.output_format, HR_FORMAT_INT8);
    EXPECT_TRUE(k.layouts & HR_LAYOUT_BHTD);
    EXPECT_EQ(k.masked_row, HR_MASKED_ROW_ZEROS);
    EXPECT_TRUE(k.mask_kinds & HR_MASK_NONE);
    EXPECT_EQ(k.mask_kinds & ~all, 0u);
    if (!t[i].flawed) {
      EXPECT_EQ(k.mask_kinds, all);  // every sound kernel takes every mask
    }
    if (k.input_format == HR_FORMAT_INT8) {
      for (const hr_quant& q : {k.q_quant, k.k_quant, k.v_quant}) {
        EXPECT_EQ(q.granularity, HR_QUANT_PER_TOKEN);
        EXPECT_EQ(q.asymmetric, 0);
      }
    }
  }
}

}  // namespace
