// headroom tests — declarations, receiving, packing, plug-ins and the registry (attach.h, kernel.h).
#include <dlfcn.h>

#include <cmath>
#include <cstring>
#include <filesystem>
#include <fstream>
#include <limits>
#include <string>

#include <gtest/gtest.h>

#include "attach_cases.h"
#include "headroom/attach.h"
#include "headroom/binary16.h"
#include "headroom/bundled_registry.h"
#include "headroom/input_error.h"
#include "headroom/kernel.h"
#include "headroom/kernel_abi.h"

namespace headroom {
namespace {

using testing::block_case;
using testing::core_case;

constexpr double kInf = std::numeric_limits<double>::infinity();

// ---- test-only kernels ---------------------------------------------------

// Copies Q to O element by element through the strides, whatever the element
// size: the output must then equal the received Q bit for bit.
std::int32_t copy_q_to_o(const hr_core_problem* p) {
  const std::size_t n = p->q.format == HR_FORMAT_FLOAT64 ? 8 : p->q.format == HR_FORMAT_FLOAT32 ? 4 : 2;
  const auto* q = static_cast<const unsigned char*>(p->q.data);
  auto* o = static_cast<unsigned char*>(p->o.data);
  for (std::int64_t b = 0; b < p->batch; ++b)
    for (std::int64_t h = 0; h < p->q_heads; ++h)
      for (std::int64_t i = 0; i < p->q_len; ++i)
        for (std::int64_t d = 0; d < p->key_dim; ++d) {
          const std::int64_t src = b * p->q.strides[0] + h * p->q.strides[1] + i * p->q.strides[2] + d * p->q.strides[3];
          const std::int64_t dst = b * p->o.strides[0] + h * p->o.strides[1] + i * p->o.strides[2] + d * p->o.strides[3];
          std::memcpy(o + dst * static_cast<std::int64_t>(n), q + src * static_cast<std::int64_t>(n), n);
        }
  return HR_OK;
}

// Writes the int8 codes of Q, as doubles, into a float64 O.
std::int32_t copy_codes(const hr_core_problem* p) {
  const auto* q = static_cast<const std::int8_t*>(p->q.data);
  auto* o = static_cast<double*>(p->o.data);
  for (std::int64_t b = 0; b < p->batch; ++b)
    for (std::int64_t h = 0; h < p->q_heads; ++h)
      for (std::int64_t i = 0; i < p->q_len; ++i)
        for (std::int64_t d = 0; d < p->key_dim; ++d) {
          const std::int64_t at = b * p->q.strides[0] + h * p->q.strides[1] + i * p->q.strides[2] + d * p->q.strides[3];
          o[b * p->o.strides[0] + h * p->o.strides[1] + i * p->o.strides[2] + d * p->o.strides[3]] = q[at];
        }
  return HR_OK;
}

// Dequantises Q through the scales and zero points at the group index that
// kernel_abi.h's hr_granularity comment documents, into a float64 O:
// (c − z)·s is exact in double (|c − z| ≤ 255, s has 24 bits).
int g_granularity = 0;  // the granularity of the kernel under test
std::int32_t dequantize_with_scales(const hr_core_problem* p) {
  const auto* q = static_cast<const std::int8_t*>(p->q.data);
  auto* o = static_cast<double*>(p->o.data);
  const std::int64_t H = p->q_heads, T = p->q_len, D = p->key_dim;
  for (std::int64_t b = 0; b < p->batch; ++b)
    for (std::int64_t h = 0; h < H; ++h)
      for (std::int64_t t = 0; t < T; ++t)
        for (std::int64_t d = 0; d < D; ++d) {
          std::int64_t g = 0;
          switch (g_granularity) {
            case HR_QUANT_PER_HEAD: g = h; break;
            case HR_QUANT_PER_TOKEN: g = (b * H + h) * T + t; break;
            case HR_QUANT_PER_CHANNEL: g = h * D + d; break;
            default: g = 0;
          }
          const std::int64_t at = b * p->q.strides[0] + h * p->q.strides[1] + t * p->q.strides[2] + d * p->q.strides[3];
          const double z = p->q.zero_points != nullptr ? p->q.zero_points[g] : 0.0;
          o[b * p->o.strides[0] + h * p->o.strides[1] + t * p->o.strides[2] + d * p->o.strides[3]] =
              (static_cast<double>(q[at]) - z) * static_cast<double>(p->q.scales[g]);
        }
  return HR_OK;
}

// What the last recording call saw.
hr_core_problem g_seen{};
std::vector<std::int64_t> g_key_lengths;
std::vector<unsigned char> g_allowed;
std::vector<float> g_bias;

std::int32_t record(const hr_core_problem* p) {
  g_seen = *p;
  g_key_lengths.clear();
  g_allowed.clear();
  g_bias.clear();
  if (p->mask.key_lengths != nullptr) g_key_lengths.assign(p->mask.key_lengths, p->mask.key_lengths + p->batch);
  const std::int64_t n = p->mask.extents[0] * p->mask.extents[1] * p->mask.extents[2] * p->mask.extents[3];
  if (p->mask.allowed != nullptr) g_allowed.assign(p->mask.allowed, p->mask.allowed + n);
  if (p->mask.bias != nullptr) g_bias.assign(p->mask.bias, p->mask.bias + n);
  std::memset(p->o.data, 0, static_cast<std::size_t>(p->batch * p->q_heads * p->q_len * p->value_dim) * 4);
  if (p->lse != nullptr) {
    for (std::int64_t i = 0; i < p->batch * p->q_heads * p->q_len; ++i) p->lse[i] = static_cast<float>(i);
  }
  return HR_OK;
}

hr_block_problem g_block{};
// Copies X_q to Y (model_dim both), records what it saw.
std::int32_t copy_x_to_y(const hr_block_problem* p) {
  g_block = *p;
  std::memcpy(p->y.data, p->x_q.data, static_cast<std::size_t>(p->batch * p->q_len * p->model_dim) * 4);
  return HR_OK;
}

hr_kernel base_kernel() {
  hr_kernel k{};
  k.abi_version = HEADROOM_ABI_VERSION;
  k.name = "test_kernel";
  k.description = "a test kernel";
  k.level = HR_LEVEL_CORE;
  k.input_format = HR_FORMAT_FLOAT32;
  k.output_format = HR_FORMAT_FLOAT32;
  k.mask_kinds = HR_MASK_NONE;
  k.masked_row = HR_MASKED_ROW_ZEROS;
  k.layouts = HR_LAYOUT_BHTD;
  k.run_core = record;
  return k;
}

KernelDeclaration declared(const hr_kernel& k) { return declaration_of(&k, "test"); }

// ---- declarations --------------------------------------------------------

TEST(AttachDeclaration, ReadsEveryField) {
  hr_kernel k = base_kernel();
  k.input_format = HR_FORMAT_INT8;
  k.q_quant = {HR_QUANT_PER_TOKEN, 0};
  k.k_quant = {HR_QUANT_PER_CHANNEL, 1};
  k.v_quant = {HR_QUANT_PER_HEAD, 0};
  k.mask_kinds = HR_MASK_NONE | HR_MASK_KEY_PADDING;
  k.masked_row = HR_MASKED_ROW_NAN;
  k.returns_lse = 1;
  k.layouts = HR_LAYOUT_BTHD;
  k.max_kv_len = 4096;
  const KernelDeclaration d = declared(k);
  EXPECT_EQ(d.name, "test_kernel");
  EXPECT_EQ(d.description, "a test kernel");
  EXPECT_EQ(d.input_format, Format::int8);
  EXPECT_EQ(d.output_format, Format::float32);
  EXPECT_EQ(d.q_quant.granularity, Granularity::per_token);
  EXPECT_EQ(d.k_quant, (QuantScheme{Granularity::per_channel, true}));
  EXPECT_EQ(d.v_quant.granularity, Granularity::per_head);
  EXPECT_EQ(d.masked_row, MaskedRowConvention::nan);
  EXPECT_TRUE(d.returns_lse);
  EXPECT_EQ(d.layouts, static_cast<std::uint32_t>(HR_LAYOUT_BTHD));
  EXPECT_EQ(d.max_kv_len, 4096);
  EXPECT_TRUE(d.supports(MaskKind::key_padding));
  EXPECT_TRUE(d.supports(MaskKind::none));
  EXPECT_FALSE(d.supports(MaskKind::causal_top_left));
  EXPECT_FALSE(d.supports(MaskKind::dense));
  const std::string line = declaration_summary(d);
  EXPECT_NE(line.find("in=int8"), std::string::npos) << line;
  EXPECT_NE(line.find("k=per_channel,asymmetric"), std::string::npos) << line;
  EXPECT_NE(line.find("masks=none,key_padding"), std::string::npos) << line;
  EXPECT_NE(line.find("layouts=BTHD"), std::string::npos) << line;
  EXPECT_NE(line.find("max_kv_len=4096"), std::string::npos) << line;
  EXPECT_EQ(line.find('\n'), std::string::npos);
}

struct Garbage {
  const char* what;
  void (*spoil)(hr_kernel&);
  const char* place;  // the field the message must name
};

const Garbage kGarbage[] = {
    {"abi version", [](hr_kernel& k) { k.abi_version = 7; }, "abi_version"},
    {"null name", [](hr_kernel& k) { k.name = nullptr; }, "name"},
    {"empty name", [](hr_kernel& k) { k.name = ""; }, "name"},
    {"upper-case name", [](hr_kernel& k) { k.name = "My Kernel"; }, "name"},
    {"long name", [](hr_kernel& k) { k.name = "a_name_much_longer_than_sixty_four_characters_is_refused_as_garbage_x"; }, "name"},
    {"unknown level", [](hr_kernel& k) { k.level = 7; }, "level"},
    {"unknown input format", [](hr_kernel& k) { k.input_format = 9; }, "input_format"},
    {"negative output format", [](hr_kernel& k) { k.output_format = -1; }, "output_format"},
    {"int8 output", [](hr_kernel& k) { k.output_format = HR_FORMAT_INT8; }, "output_format"},
    {"int8 block", [](hr_kernel& k) { k.level = HR_LEVEL_BLOCK; k.input_format = HR_FORMAT_INT8; k.run_core = nullptr;
                                      k.run_block = copy_x_to_y; }, "input_format"},
    {"quant on float", [](hr_kernel& k) { k.k_quant.granularity = HR_QUANT_PER_HEAD; }, "q_quant"},
    {"bad granularity", [](hr_kernel& k) { k.input_format = HR_FORMAT_INT8; k.v_quant.granularity = 9; }, "v_quant"},
    {"bad asymmetric", [](hr_kernel& k) { k.input_format = HR_FORMAT_INT8; k.q_quant.asymmetric = 2; }, "q_quant"},
    {"no mask", [](hr_kernel& k) { k.mask_kinds = 0; }, "mask_kinds"},
    {"unknown mask bit", [](hr_kernel& k) { k.mask_kinds = HR_MASK_NONE | (1u << 9); }, "mask_kinds"},
    {"bad masked row", [](hr_kernel& k) { k.masked_row = 5; }, "masked_row"},
    {"lse not 0/1", [](hr_kernel& k) { k.returns_lse = 2; }, "returns_lse"},
    {"no layout", [](hr_kernel& k) { k.layouts = 0; }, "layouts"},
    {"unknown layout", [](hr_kernel& k) { k.layouts = 1u << 5; }, "layouts"},
    {"negative max_kv_len", [](hr_kernel& k) { k.max_kv_len = -1; }, "max_kv_len"},
    {"no run function", [](hr_kernel& k) { k.run_core = nullptr; }, "run_core"},
    {"block without run_block", [](hr_kernel& k) { k.level = HR_LEVEL_BLOCK; k.run_core = nullptr; }, "run_block"},
    {"both run functions", [](hr_kernel& k) { k.run_block = copy_x_to_y; }, "run_block"},
    {"lse on block", [](hr_kernel& k) { k.level = HR_LEVEL_BLOCK; k.run_core = nullptr; k.run_block = copy_x_to_y;
                                        k.returns_lse = 1; }, "returns_lse"},
};

TEST(AttachDeclaration, RefusesGarbageNamingTheFieldAndTheFix) {
  for (const Garbage& g : kGarbage) {
    hr_kernel k = base_kernel();
    g.spoil(k);
    try {
      declaration_of(&k, "libgarbage.so");
      ADD_FAILURE() << g.what << ": accepted";
    } catch (const InputError& e) {
      EXPECT_EQ(e.file(), "libgarbage.so") << g.what;
      EXPECT_NE(e.place().find(g.place), std::string::npos) << g.what << ": " << e.what();
      EXPECT_FALSE(e.fix().empty()) << g.what;
    }
  }
  try {
    declaration_of(nullptr, "libnull.so");
    ADD_FAILURE() << "null declaration accepted";
  } catch (const InputError& e) {
    EXPECT_NE(std::string(e.what()).find(HEADROOM_KERNEL_ENTRY), std::string::npos) << e.what();
  }
}

TEST(AttachDeclaration, NameWithoutTerminatorIsBounded) {
  // 100 name bytes and no NUL inside them: strnlen must stop at 65 and refuse.
  char raw[100];
  std::memset(raw, 'a', sizeof raw);
  raw[99] = '\0';
  hr_kernel k = base_kernel();
  k.name = raw;
  EXPECT_THROW(declared(k), InputError);
  raw[64] = '\0';
  EXPECT_EQ(declared(k).name.size(), 64u);
}

// ---- receiving ----------------------------------------------------------

KernelDeclaration float_declaration(Format in, Format out = Format::float32) {
  KernelDeclaration d;
  d.name = "recv";
  d.input_format = in;
  d.output_format = out;
  d.mask_kinds = HR_MASK_NONE | HR_MASK_KEY_PADDING | HR_MASK_DENSE | HR_MASK_BIAS | HR_MASK_CAUSAL_TOP_LEFT;
  return d;
}

TEST(AttachReceive, RoundsToTheDeclaredFormat) {
  Case c = core_case({1, 2, 1, 3, 4, 5, 5}, MaskKind::none, 1);
  // IEEE 754-2019 §4.3.1/§7.4: 65520 = 2^15·(2 − 2^-11) is the binary16 overflow
  // threshold under round-to-nearest: it and beyond become +inf; 65519 → 65504.
  c.core_inputs.q.values[0] = 65520.0;
  c.core_inputs.q.values[1] = 65519.0;
  c.core_inputs.q.values[2] = 1.0 + 0x1p-11;  // a tie: to even, 1.0
  c.core_inputs.q.values[3] = 0.1;            // not float32-exact on purpose
  const ReceivedCase h = receive(c, float_declaration(Format::binary16));
  EXPECT_EQ(h.input_format, Format::binary16);
  EXPECT_EQ(h.received.core_inputs.q.values[0], kInf);
  EXPECT_EQ(h.received.core_inputs.q.values[1], 65504.0);
  EXPECT_EQ(h.received.core_inputs.q.values[2], 1.0);
  for (std::size_t i = 0; i < c.core_inputs.k.values.size(); ++i) {
    const double x = c.core_inputs.k.values[i];
    EXPECT_EQ(h.received.core_inputs.k.values[i], binary16_to_float(double_to_binary16(x)));
  }
  const ReceivedCase b = receive(c, float_declaration(Format::bfloat16));
  for (std::size_t i = 0; i < c.core_inputs.v.values.size(); ++i) {
    EXPECT_EQ(b.received.core_inputs.v.values[i], bfloat16_to_float(double_to_bfloat16(c.core_inputs.v.values[i])));
  }
  const ReceivedCase f = receive(c, float_declaration(Format::float32));
  EXPECT_EQ(f.received.core_inputs.q.values[3], static_cast<double>(0.1f));
  const ReceivedCase d = receive(c, float_declaration(Format::float64));
  EXPECT_EQ(d.received.core_inputs.q.values[3], 0.1);
  EXPECT_EQ(d.received.core_inputs.q.values[0], 65520.0);
}

TEST(AttachReceive, RoundsTheUpstreamGradientLikeTheInputs) {
  Case c = core_case({1, 2, 1, 3, 4, 5, 5}, MaskKind::none, 1);
  EXPECT_TRUE(receive(c, float_declaration(Format::binary16)).received.d_o.values.empty());
  c.d_o = Tensor({1, 2, 3, 5});
  for (std::size_t i = 0; i < c.d_o.values.size(); ++i) c.d_o.values[i] = 0.1 * static_cast<double>(i) - 1.0;
  c.d_o.values[0] = 65520.0;  // past binary16's overflow threshold, as above
  const ReceivedCase h = receive(c, float_declaration(Format::binary16));
  EXPECT_EQ(h.received.d_o.values[0], kInf);
  for (std::size_t i = 1; i < c.d_o.values.size(); ++i)
    EXPECT_EQ(h.received.d_o.values[i], binary16_to_float(double_to_binary16(c.d_o.values[i])));
  EXPECT_EQ(receive(c, float_declaration(Format::float32)).received.d_o.values[3], static_cast<double>(static_cast<float>(0.1 * 3 - 1.0)));
  EXPECT_EQ(receive(c, float_declaration(Format::float64)).received.d_o.values[3], 0.1 * 3 - 1.0);
}

TEST(AttachReceive, QuantisesInt8WithTheDeclaredSchemes) {
  const Case c = core_case({2, 2, 1, 3, 4, 6, 6}, MaskKind::none, 2);
  KernelDeclaration d = float_declaration(Format::int8);
  d.q_quant = {Granularity::per_token, false};
  d.k_quant = {Granularity::per_channel, true};
  d.v_quant = {Granularity::per_tensor, false};
  const ReceivedCase r = receive(c, d);
  ASSERT_TRUE(r.q8 && r.k8 && r.v8);
  EXPECT_EQ(r.q8->scheme, d.q_quant);
  EXPECT_EQ(r.k8->scheme, d.k_quant);
  EXPECT_EQ(r.q8->scales.size(), 2u * 2u * 3u);  // per token: B·H·T
  EXPECT_TRUE(bit_identical(r.received.core_inputs.q, dequantize(quantize(c.core_inputs.q, d.q_quant))));
  EXPECT_TRUE(bit_identical(r.received.core_inputs.k, dequantize(*r.k8)));
  EXPECT_TRUE(bit_identical(r.received.core_inputs.v, dequantize(*r.v8)));
  EXPECT_FALSE(bit_identical(r.received.core_inputs.q, c.core_inputs.q));  // quantisation did change values
}

TEST(AttachReceive, MaskAsTheAbiCarriesIt) {
  Case c = core_case({1, 1, 1, 2, 3, 4, 4}, MaskKind::bias, 3);
  c.core.mask.bias.values[1] = 0.1;  // rounds to float32
  const ReceivedCase r = receive(c, float_declaration(Format::float32));
  EXPECT_EQ(r.received.core.mask.bias.values[1], static_cast<double>(0.1f));
  Case dense = core_case({1, 1, 1, 2, 3, 4, 4}, MaskKind::dense, 4);
  dense.core.mask.allowed.values[1] = 5.0;
  const ReceivedCase rd = receive(dense, float_declaration(Format::float32));
  EXPECT_EQ(rd.received.core.mask.allowed.values[1], 1.0);
}

TEST(AttachReceive, RefusesCasesTheKernelDidNotDeclare) {
  KernelDeclaration d = float_declaration(Format::float32);
  d.mask_kinds = HR_MASK_NONE | HR_MASK_KEY_PADDING;
  d.max_kv_len = 8;
  EXPECT_FALSE(why_unfit(core_case({1, 1, 1, 2, 8, 4, 4}, MaskKind::none, 5), d));
  const Case causal = core_case({1, 1, 1, 2, 3, 4, 4}, MaskKind::causal_top_left, 5);
  ASSERT_TRUE(why_unfit(causal, d));
  EXPECT_NE(why_unfit(causal, d)->find("causal_top_left"), std::string::npos);
  try {
    receive(causal, d);
    ADD_FAILURE() << "undeclared mask accepted";
  } catch (const InputError& e) {
    EXPECT_EQ(e.file(), causal.name);
  }
  EXPECT_TRUE(why_unfit(core_case({1, 1, 1, 2, 9, 4, 4}, MaskKind::none, 5), d));  // 9 keys > 8
  Case empty_row = core_case({2, 1, 1, 2, 3, 4, 4}, MaskKind::key_padding, 5);
  empty_row.core.mask.key_lengths = {3, 0};
  EXPECT_FALSE(why_unfit(empty_row, d));
  d.masked_row = MaskedRowConvention::never_called;
  EXPECT_TRUE(why_unfit(empty_row, d));
  empty_row.core.mask.key_lengths = {3, 1};
  EXPECT_FALSE(why_unfit(empty_row, d));
  const Case block = block_case({1, 2, 2, 4, 2, 1, 2, 2}, 6, false);
  EXPECT_TRUE(why_unfit(block, d));  // level
  KernelDeclaration bd = d;
  bd.level = Level::block;
  EXPECT_FALSE(why_unfit(block, bd));
  Case broken = core_case({1, 1, 1, 2, 3, 4, 4}, MaskKind::none, 7);
  broken.core_inputs.k = Tensor({1, 1, 2, 4});  // 2 keys where the shape says 3
  EXPECT_THROW(receive(broken, float_declaration(Format::float32)), InputError);
}

// ---- packing, seen from inside a kernel ---------------------------------

KernelRun run_in_process(const hr_kernel& k, const Case& c, bool isolate = false) {
  auto kernel = attach_in_process(&k);
  return kernel->run(receive(c, kernel->declaration()), RunOptions{isolate, 5.0, std::uint64_t{1} << 30});
}

TEST(AttachPacking, EveryFormatAndLayoutRoundTripsBitForBit) {
  const Format formats[] = {Format::float64, Format::float32, Format::binary16, Format::bfloat16};
  const std::int32_t abi[] = {HR_FORMAT_FLOAT64, HR_FORMAT_FLOAT32, HR_FORMAT_BINARY16, HR_FORMAT_BFLOAT16};
  for (int f = 0; f < 4; ++f) {
    for (std::uint32_t layout : {HR_LAYOUT_BHTD, HR_LAYOUT_BTHD, HR_LAYOUT_BHTD | HR_LAYOUT_BTHD}) {
      for (bool isolate : {false, true}) {
        hr_kernel k = base_kernel();
        k.input_format = abi[f];
        k.output_format = abi[f];
        k.layouts = layout;
        k.run_core = copy_q_to_o;
        const Case c = core_case({2, 3, 3, 5, 4, 7, 7}, MaskKind::none, 10 + static_cast<std::uint32_t>(f));
        auto kernel = attach_in_process(&k);
        const ReceivedCase r = receive(c, kernel->declaration());
        const KernelRun run = kernel->run(r, RunOptions{isolate, 5.0, std::uint64_t{1} << 30});
        ASSERT_EQ(run.status, RunStatus::ok) << run.detail;
        EXPECT_TRUE(bit_identical(run.out, r.received.core_inputs.q))
            << format_name(formats[f]) << " layout " << layout << " isolate " << isolate;
        EXPECT_EQ(run.lse.size(), 1) << "no lse declared, none returned";
        EXPECT_TRUE(run.lse.values.empty());
      }
    }
  }
}

TEST(AttachPacking, StridesMasksAndLseAsDeclared) {
  hr_kernel k = base_kernel();
  k.mask_kinds = HR_MASK_DENSE | HR_MASK_BIAS | HR_MASK_KEY_PADDING;
  k.returns_lse = 1;
  k.layouts = HR_LAYOUT_BTHD;
  const CoreShape s{2, 4, 2, 3, 5, 6, 7};
  const Case dense = core_case(s, MaskKind::dense, 20);
  KernelRun run = run_in_process(k, dense);
  ASSERT_EQ(run.status, RunStatus::ok) << run.detail;
  // BTHD: extents stay [B, H, T, D]; memory order is batch, token, head, dim.
  EXPECT_EQ(g_seen.q.extents[1], 4);
  EXPECT_EQ(g_seen.q.strides[3], 1);
  EXPECT_EQ(g_seen.q.strides[1], 6);
  EXPECT_EQ(g_seen.q.strides[2], 4 * 6);
  EXPECT_EQ(g_seen.q.strides[0], 3 * 4 * 6);
  EXPECT_EQ(g_seen.k.strides[2], 2 * 6);
  EXPECT_EQ(g_seen.o.strides[1], 7);
  EXPECT_EQ(g_seen.scale, dense.core.scale);
  EXPECT_EQ(g_seen.mask.kind, static_cast<std::uint32_t>(HR_MASK_DENSE));
  EXPECT_EQ(g_seen.mask.extents[1], 1);
  EXPECT_EQ(g_seen.mask.strides[1], 0) << "a head extent of 1 broadcasts";
  ASSERT_EQ(g_allowed.size(), dense.core.mask.allowed.values.size());
  for (std::size_t i = 0; i < g_allowed.size(); ++i) EXPECT_EQ(g_allowed[i], dense.core.mask.allowed.values[i] != 0 ? 1 : 0);
  ASSERT_EQ(run.lse.shape, (std::vector<std::int64_t>{2, 4, 3}));
  for (std::size_t i = 0; i < run.lse.values.size(); ++i) EXPECT_EQ(run.lse.values[i], static_cast<double>(i));

  const Case bias = core_case(s, MaskKind::bias, 21);
  run = run_in_process(k, bias);
  ASSERT_EQ(run.status, RunStatus::ok) << run.detail;
  EXPECT_EQ(g_seen.mask.extents[1], 4);
  EXPECT_EQ(g_seen.mask.strides[1], 3 * 5);
  ASSERT_EQ(g_bias.size(), bias.core.mask.bias.values.size());
  for (std::size_t i = 0; i < g_bias.size(); ++i) EXPECT_EQ(static_cast<double>(g_bias[i]), bias.core.mask.bias.values[i]);

  const Case pad = core_case(s, MaskKind::key_padding, 22);
  run = run_in_process(k, pad);
  ASSERT_EQ(run.status, RunStatus::ok) << run.detail;
  EXPECT_EQ(g_key_lengths, pad.core.mask.key_lengths);
  EXPECT_EQ(g_seen.mask.allowed, nullptr);
  EXPECT_EQ(g_seen.mask.bias, nullptr);
}

TEST(AttachPacking, Int8CodesInEveryScheme) {
  hr_kernel k = base_kernel();
  k.input_format = HR_FORMAT_INT8;
  k.output_format = HR_FORMAT_FLOAT64;
  k.run_core = copy_codes;
  const Case c = core_case({2, 2, 2, 3, 3, 4, 4}, MaskKind::none, 30);
  for (hr_granularity g : {HR_QUANT_PER_TENSOR, HR_QUANT_PER_HEAD, HR_QUANT_PER_TOKEN, HR_QUANT_PER_CHANNEL}) {
    for (std::int32_t asym : {0, 1}) {
      k.q_quant = {g, asym};
      auto kernel = attach_in_process(&k);
      const ReceivedCase r = receive(c, kernel->declaration());
      const KernelRun run = kernel->run(r, RunOptions{true, 5.0, std::uint64_t{1} << 30});
      ASSERT_EQ(run.status, RunStatus::ok) << run.detail;
      // The kernel saw exactly the codes of the received case, isolated.
      for (std::int64_t b = 0; b < 2; ++b)
        for (std::int64_t h = 0; h < 2; ++h)
          for (std::int64_t t = 0; t < 3; ++t)
            for (std::int64_t d = 0; d < 4; ++d) {
              const std::int64_t flat = ((b * 2 + h) * 3 + t) * 4 + d;
              EXPECT_EQ(run.out.values[static_cast<std::size_t>(flat)], r.q8->codes[static_cast<std::size_t>(flat)]);
            }
    }
  }
}

TEST(AttachPacking, Int8DequantisedByTheKernelEqualsTheReceivedValues) {
  hr_kernel k = base_kernel();
  k.input_format = HR_FORMAT_INT8;
  k.output_format = HR_FORMAT_FLOAT64;
  k.run_core = dequantize_with_scales;
  k.layouts = HR_LAYOUT_BTHD;
  const Case c = core_case({2, 2, 2, 3, 3, 4, 4}, MaskKind::none, 31);
  for (hr_granularity g : {HR_QUANT_PER_TENSOR, HR_QUANT_PER_HEAD, HR_QUANT_PER_TOKEN, HR_QUANT_PER_CHANNEL}) {
    for (std::int32_t asym : {0, 1}) {
      k.q_quant = {g, asym};
      g_granularity = g;
      auto kernel = attach_in_process(&k);
      const ReceivedCase r = receive(c, kernel->declaration());
      const KernelRun run = kernel->run(r, RunOptions{false, 5.0, 0});
      ASSERT_EQ(run.status, RunStatus::ok) << run.detail;
      EXPECT_TRUE(bit_identical(run.out, r.received.core_inputs.q)) << "granularity " << g << " asymmetric " << asym;
    }
  }
}

TEST(AttachPacking, BlockInputsAndAbsentBiases) {
  hr_kernel k = base_kernel();
  k.level = HR_LEVEL_BLOCK;
  k.run_core = nullptr;
  k.run_block = copy_x_to_y;
  for (bool biases : {false, true}) {
    const Case c = block_case({2, 3, 4, 6, 2, 1, 3, 3}, 40, biases);
    const KernelRun run = run_in_process(k, c, true);
    ASSERT_EQ(run.status, RunStatus::ok) << run.detail;
    EXPECT_EQ(run.out.shape, (std::vector<std::int64_t>{2, 3, 6}));
    EXPECT_TRUE(bit_identical(run.out, c.block_inputs.x_q));
    const KernelRun local = run_in_process(k, c, false);  // g_block is only seen in-process
    ASSERT_EQ(local.status, RunStatus::ok);
    EXPECT_EQ(g_block.w_o.extents[2], 2 * 3);
    EXPECT_EQ(g_block.w_o.extents[3], 6);
    EXPECT_EQ(g_block.x_kv.extents[2], 4);
    EXPECT_EQ(g_block.b_q.extents[3], 2 * 3);
    EXPECT_EQ(g_block.b_o.data == nullptr, !biases);
    EXPECT_EQ(g_block.b_k.data == nullptr, !biases);
  }
}

TEST(AttachPacking, RefusesACaseReceivedForAnotherKernel) {
  hr_kernel k = base_kernel();
  auto kernel = attach_in_process(&k);
  const Case c = core_case({1, 1, 1, 2, 2, 3, 3}, MaskKind::none, 50);
  const ReceivedCase half = receive(c, float_declaration(Format::binary16));
  EXPECT_THROW(kernel->run(half, RunOptions{}), std::invalid_argument);
}

// ---- plug-ins and the registry --------------------------------------------

TEST(AttachLibrary, LoadsTheExamplePlugin) {
  auto kernel = attach_library(HEADROOM_EXAMPLE_PLUGIN);
  EXPECT_EQ(kernel->declaration().name, "my_kernel");
  EXPECT_TRUE(kernel->declaration().returns_lse);
  const Case c = core_case({1, 2, 1, 4, 6, 8, 8}, MaskKind::causal_top_left, 60);
  const KernelRun run = kernel->run(receive(c, kernel->declaration()), RunOptions{true, 5.0, std::uint64_t{1} << 30});
  ASSERT_EQ(run.status, RunStatus::ok) << run.detail;
  // Query 0 sees key 0 only: its output row is V[0] exactly (p = 1).
  for (std::int64_t d = 0; d < 8; ++d) EXPECT_EQ(run.out.at(0, 0, 0, d), c.core_inputs.v.at(0, 0, 0, d));
  EXPECT_FLOAT_EQ(static_cast<float>(run.lse.at(0, 0, 0)),
                  c.core.scale * [&] {
                    float dot = 0;
                    for (std::int64_t d = 0; d < 8; ++d)
                      dot += static_cast<float>(c.core_inputs.q.at(0, 0, 0, d)) * static_cast<float>(c.core_inputs.k.at(0, 0, 0, d));
                    return dot;
                  }());
}

void expect_refused(const std::string& path, const std::string& problem_part, const std::string& fix_part) {
  try {
    attach_library(path);
    ADD_FAILURE() << path << " accepted";
  } catch (const InputError& e) {
    EXPECT_EQ(e.file(), path);
    EXPECT_NE(e.problem().find(problem_part), std::string::npos) << e.what();
    EXPECT_NE(e.fix().find(fix_part), std::string::npos) << e.what();
  }
}

TEST(AttachLibrary, RefusesMissingBrokenAndWrongVersionPlugins) {
  expect_refused("/nonexistent/libnothing.so", "no such file", "cc -shared");
  expect_refused(HEADROOM_WRONG_VERSION_PLUGIN, "version " + std::to_string(HEADROOM_ABI_VERSION + 1), "rebuild");
  expect_refused(HEADROOM_NO_ENTRY_PLUGIN, HEADROOM_KERNEL_ENTRY, "extern \"C\"");
  const std::string text = (std::filesystem::temp_directory_path() / "headroom-attach-not-a-library.so").string();
  std::ofstream(text) << "not an ELF file\n";
  expect_refused(text, "", "shared library");
  std::filesystem::remove(text);
}

TEST(AttachRegistry, BundledKernelsAreFoundByName) {
  const auto& all = bundled_kernels();
  for (const BundledKernel& k : all) {
    const BundledKernel* found = find_bundled(k.declaration.name);
    ASSERT_NE(found, nullptr) << k.declaration.name;
    EXPECT_EQ(found->kernel, k.kernel);
    EXPECT_EQ(k.flawed, !k.expected_fault.empty());
    auto attached = attach_kernel(k.declaration.name);
    EXPECT_EQ(attached->declaration().name, k.declaration.name);
  }
  EXPECT_EQ(find_bundled("no-such-kernel"), nullptr);
}

TEST(AttachRegistry, ResolvesSpecsAndExplainsUnknownNames) {
  try {
    attach_kernel("no-such-kernel");
    ADD_FAILURE() << "unknown name accepted";
  } catch (const InputError& e) {
    EXPECT_EQ(e.file(), "no-such-kernel");
    EXPECT_NE(e.fix().find("headroom kernels --names"), std::string::npos) << e.what();
  }
  EXPECT_EQ(attach_kernel(HEADROOM_EXAMPLE_PLUGIN)->declaration().name, "my_kernel");
  // A name ending in .so is a path even without a '/': a missing one says so.
  try {
    attach_kernel("libmissing_kernel.so");
    ADD_FAILURE() << "missing library accepted";
  } catch (const InputError& e) {
    EXPECT_NE(e.problem().find("no such file"), std::string::npos) << e.what();
  }
}

}  // namespace
}  // namespace headroom
