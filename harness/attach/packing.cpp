// headroom — laying a received case out as hr_core_problem / hr_block_problem (packing.h).
#include "attach/packing.h"

#include <algorithm>
#include <cstring>
#include <stdexcept>
#include <string>

#include "attach/elements.h"
#include "headroom/varlen.h"
#include "headroom/paged_kv.h"

namespace headroom::attach_detail {
namespace {

using Role = GuardedArena::Role;

std::int32_t abi_format(Format f) {
  switch (f) {
    case Format::float64: return HR_FORMAT_FLOAT64;
    case Format::float32: return HR_FORMAT_FLOAT32;
    case Format::binary16: return HR_FORMAT_BINARY16;
    case Format::bfloat16: return HR_FORMAT_BFLOAT16;
    case Format::int8: return HR_FORMAT_INT8;
    case Format::e4m3: return HR_FORMAT_E4M3;
    case Format::e5m2: return HR_FORMAT_E5M2;
  }
  return -1;
}

std::size_t count(const std::int64_t e[4]) { return static_cast<std::size_t>(e[0] * e[1] * e[2] * e[3]); }

// BHTD: dim fastest, then token, head, batch. BTHD: dim, head, token, batch —
// the extents stay [B, H, T, D] either way (kernel_abi.h).
void set_strides(const std::int64_t e[4], bool bthd, std::int64_t s[4]) {
  s[3] = 1;
  if (bthd) {
    s[1] = e[3];
    s[2] = e[1] * e[3];
    s[0] = e[2] * e[1] * e[3];
  } else {
    s[2] = e[3];
    s[1] = e[2] * e[3];
    s[0] = e[1] * e[2] * e[3];
  }
}

void set4(std::int64_t dst[4], std::int64_t a, std::int64_t b, std::int64_t c, std::int64_t d) {
  dst[0] = a, dst[1] = b, dst[2] = c, dst[3] = d;
}

// Calls f(row_major_index, strided_offset) for every element of extents e.
template <class F>
void for_each_element(const std::int64_t e[4], const std::int64_t s[4], F&& f) {
  std::size_t flat = 0;
  for (std::int64_t i0 = 0; i0 < e[0]; ++i0)
    for (std::int64_t i1 = 0; i1 < e[1]; ++i1)
      for (std::int64_t i2 = 0; i2 < e[2]; ++i2)
        for (std::int64_t i3 = 0; i3 < e[3]; ++i3, ++flat)
          f(flat, static_cast<std::size_t>(i0 * s[0] + i1 * s[1] + i2 * s[2] + i3 * s[3]));
}

// One input tensor: its slots are reserved first, filled after allocate().
struct InputPlan {
  const Tensor* values = nullptr;
  const QuantizedTensor* codes = nullptr;  ///< int8, e4m3, e5m2
  std::int64_t extents[4] = {1, 1, 1, 1};
  std::int64_t strides[4] = {0, 0, 0, 0};
  std::size_t slot = 0, scale_slot = 0, zero_slot = 0;
  bool present = false;
};

InputPlan plan_input(GuardedArena& arena, const char* name, const Tensor* t, const QuantizedTensor* q,
                     const std::int64_t extents[4], bool bthd, Format f) {
  InputPlan p;
  p.values = t;
  p.codes = q;
  std::memcpy(p.extents, extents, sizeof p.extents);
  set_strides(p.extents, bthd, p.strides);
  p.present = count(p.extents) > 0 && (t == nullptr || !t->values.empty());
  if (!p.present) return p;
  p.slot = arena.add(name, Role::input, count(p.extents) * item_size(f));
  if (q != nullptr) {
    p.scale_slot = arena.add(std::string(name) + "_scale", Role::input, q->scales.size() * sizeof(float));
    if (q->scheme.asymmetric) {
      p.zero_slot = arena.add(std::string(name) + "_zero_point", Role::input, q->zero_points.size() * sizeof(std::int32_t));
    }
  }
  return p;
}

hr_tensor fill_input(const GuardedArena& arena, const InputPlan& p, Format f) {
  hr_tensor t{};
  t.format = abi_format(f);
  std::memcpy(t.extents, p.extents, sizeof t.extents);
  std::memcpy(t.strides, p.strides, sizeof t.strides);
  if (!p.present) return t;
  unsigned char* dst = arena.data(p.slot);
  const std::size_t n = item_size(f);
  if (p.codes != nullptr) {
    for_each_element(p.extents, p.strides, [&](std::size_t i, std::size_t at) {
      dst[at] = static_cast<unsigned char>(p.codes->codes[i]);
    });
    std::memcpy(arena.data(p.scale_slot), p.codes->scales.data(), p.codes->scales.size() * sizeof(float));
    t.scales = reinterpret_cast<const float*>(arena.data(p.scale_slot));
    if (p.codes->scheme.asymmetric) {
      std::memcpy(arena.data(p.zero_slot), p.codes->zero_points.data(), p.codes->zero_points.size() * sizeof(std::int32_t));
      t.zero_points = reinterpret_cast<const std::int32_t*>(arena.data(p.zero_slot));
    }
  } else {
    for_each_element(p.extents, p.strides, [&](std::size_t i, std::size_t at) {
      store_element(f, p.values->values[i], dst + at * n);
    });
  }
  t.data = dst;
  return t;
}

struct MaskPlan {
  const Mask* mask = nullptr;
  std::size_t slot = 0;
  std::int64_t extents[4] = {0, 0, 0, 0};
  std::int64_t strides[4] = {0, 0, 0, 0};
};

MaskPlan plan_mask(GuardedArena& arena, const Mask& m, const CoreShape& s) {
  MaskPlan p;
  p.mask = &m;
  if (m.kind == MaskKind::key_padding) {
    p.slot = arena.add("key_lengths", Role::input, static_cast<std::size_t>(s.batch) * sizeof(std::int64_t));
  } else if (m.kind == MaskKind::dense || m.kind == MaskKind::bias) {
    const Tensor& t = m.kind == MaskKind::dense ? m.allowed : m.bias;
    set4(p.extents, t.shape[0], t.shape[1], t.shape[2], t.shape[3]);
    // A head extent of 1 broadcasts: stride 0 lets a kernel index [b, h, i, j] for every h.
    set4(p.strides, t.shape[1] * t.shape[2] * t.shape[3], t.shape[1] == 1 ? 0 : t.shape[2] * t.shape[3], t.shape[3], 1);
    const std::size_t item = m.kind == MaskKind::dense ? 1 : sizeof(float);
    p.slot = arena.add(m.kind == MaskKind::dense ? "mask" : "bias", Role::input, count(p.extents) * item);
  }
  return p;
}

hr_mask fill_mask(const GuardedArena& arena, const MaskPlan& p) {
  hr_mask m{};
  const Mask& mask = *p.mask;
  m.kind = mask_bit(mask.kind);
  std::memcpy(m.extents, p.extents, sizeof m.extents);
  std::memcpy(m.strides, p.strides, sizeof m.strides);
  if (mask.kind == MaskKind::key_padding) {
    std::memcpy(arena.data(p.slot), mask.key_lengths.data(), mask.key_lengths.size() * sizeof(std::int64_t));
    m.key_lengths = reinterpret_cast<const std::int64_t*>(arena.data(p.slot));
  } else if (mask.kind == MaskKind::dense) {
    unsigned char* dst = arena.data(p.slot);
    for (std::size_t i = 0; i < mask.allowed.values.size(); ++i) dst[i] = mask.allowed.values[i] != 0.0 ? 1 : 0;
    m.allowed = dst;
  } else if (mask.kind == MaskKind::bias) {
    auto* dst = reinterpret_cast<float*>(arena.data(p.slot));
    for (std::size_t i = 0; i < mask.bias.values.size(); ++i) dst[i] = static_cast<float>(mask.bias.values[i]);
    m.bias = dst;
  }
  return m;
}

}  // namespace

void check_received(const ReceivedCase& c, const KernelDeclaration& d) {
  auto fail = [&](const std::string& why) {
    throw std::invalid_argument("kernel \"" + d.name + "\" run on case \"" + c.received.name + "\": " + why +
                                " (call receive(case, declaration) first)");
  };
  if (c.received.level != d.level) fail("the case's level differs from the kernel's");
  if (c.input_format != d.input_format) {
    fail("the case was received in " + std::string(format_name(c.input_format)) + ", the kernel takes " +
         std::string(format_name(d.input_format)));
  }
  const Mask& m = d.level == Level::core ? c.received.core.mask : c.received.block.mask;
  if (!d.supports(m.kind)) fail("mask kind " + std::string(mask_kind_name(m.kind)) + " not declared");
  if (is_quantised(d.input_format)) {
    if (!c.q8 || !c.k8 || !c.v8) fail("codes missing");
    if (c.q8->scheme != d.q_quant || c.k8->scheme != d.k_quant || c.v8->scheme != d.v_quant) {
      fail("quantisation schemes differ from the kernel's");
    }
  }
}

namespace {

void plan_output(PackedCall& p, const std::int64_t extents[4], bool bthd) {
  std::memcpy(p.out_extents, extents, sizeof p.out_extents);
  set_strides(p.out_extents, bthd, p.out_strides);
  p.out_slot = p.arena.add(p.level == Level::core ? "o" : "y", Role::output, count(extents) * item_size(p.output_format));
}

hr_out_tensor fill_output(PackedCall& p) {
  hr_out_tensor o{};
  fill_unwritten(p.output_format, p.arena.data(p.out_slot), count(p.out_extents));
  o.data = p.arena.data(p.out_slot);
  o.format = abi_format(p.output_format);
  std::memcpy(o.extents, p.out_extents, sizeof o.extents);
  std::memcpy(o.strides, p.out_strides, sizeof o.strides);
  return o;
}

// A paged case's K/V pool and block table (kernel_abi.h hr_paged_kv): pages
// [P, page_size, Hkv, D] contiguous, made from the received logical K/V, rows
// of pages in no table holding 0, pages the case lists as poisoned the poison.
struct PagedPlan {
  Tensor k_pages, v_pages;
  std::int64_t ke[4] = {1, 1, 1, 1}, ve[4] = {1, 1, 1, 1};
  std::size_t k_slot = 0, v_slot = 0, table_slot = 0, lens_slot = 0;
};

PagedPlan plan_paged(GuardedArena& arena, const ReceivedCase& c, Format f) {
  const CoreProblem& cp = c.received.core;
  const CoreShape& s = cp.shape;
  PagedPlan p;
  p.k_pages = scatter_pages(cp.paged, c.received.core_inputs.k);
  p.v_pages = scatter_pages(cp.paged, c.received.core_inputs.v);
  for (std::int32_t pg : c.poisoned_pages) {
    for (auto [pages, value] : {std::pair{&p.k_pages, c.page_poison_k}, std::pair{&p.v_pages, c.page_poison_v}}) {
      const std::size_t per_page = pages->values.size() / static_cast<std::size_t>(cp.paged.num_pages);
      std::fill_n(pages->values.begin() + static_cast<std::ptrdiff_t>(pg * per_page), per_page, value);
    }
  }
  set4(p.ke, cp.paged.num_pages, cp.paged.page_size, s.kv_heads, s.key_dim);
  set4(p.ve, cp.paged.num_pages, cp.paged.page_size, s.kv_heads, s.value_dim);
  p.k_slot = arena.add("k_pages", Role::input, count(p.ke) * item_size(f));
  p.v_slot = arena.add("v_pages", Role::input, count(p.ve) * item_size(f));
  p.table_slot = arena.add("block_table", Role::input, cp.paged.block_table.size() * sizeof(std::int32_t));
  p.lens_slot = arena.add("seq_lens", Role::input, cp.mask.kv_lens.size() * sizeof(std::int64_t));
  return p;
}

hr_paged_kv fill_paged(const GuardedArena& arena, const PagedPlan& pp, const CoreProblem& cp, Format f) {
  hr_paged_kv out{};
  const std::size_t n = item_size(f);
  const std::pair<const Tensor*, std::size_t> pools[2] = {{&pp.k_pages, pp.k_slot}, {&pp.v_pages, pp.v_slot}};
  hr_tensor* dst[2] = {&out.k_pages, &out.v_pages};
  const std::int64_t* extents[2] = {pp.ke, pp.ve};
  for (int t = 0; t < 2; ++t) {
    unsigned char* data = arena.data(pools[t].second);
    for (std::size_t i = 0; i < pools[t].first->values.size(); ++i) store_element(f, pools[t].first->values[i], data + i * n);
    dst[t]->data = data;
    dst[t]->format = abi_format(f);
    std::memcpy(dst[t]->extents, extents[t], sizeof dst[t]->extents);
    set_strides(dst[t]->extents, false, dst[t]->strides);
  }
  auto* table = reinterpret_cast<std::int32_t*>(arena.data(pp.table_slot));
  std::copy(cp.paged.block_table.begin(), cp.paged.block_table.end(), table);
  auto* lens = reinterpret_cast<std::int64_t*>(arena.data(pp.lens_slot));
  std::copy(cp.mask.kv_lens.begin(), cp.mask.kv_lens.end(), lens);
  out.block_table = table;
  out.seq_lens = lens;
  out.page_size = cp.paged.page_size;
  out.max_pages_per_seq = cp.paged.max_pages_per_seq;
  return out;
}

void pack_core(const ReceivedCase& c, const KernelDeclaration& d, PackedCall& p) {
  const CoreShape& s = c.received.core.shape;
  const CoreInputs& in = c.received.core_inputs;
  const bool paged = c.received.core.has_paged_kv();
  const bool bthd = (d.layouts & HR_LAYOUT_BHTD) == 0;
  const Format f = d.input_format;
  const bool int8 = is_quantised(f);  // codes with scales: int8, e4m3, e5m2
  const std::int64_t qe[4] = {s.batch, s.q_heads, s.q_len, s.key_dim};
  const std::int64_t ke[4] = {s.batch, s.kv_heads, s.kv_len, s.key_dim};
  const std::int64_t ve[4] = {s.batch, s.kv_heads, s.kv_len, s.value_dim};
  const std::int64_t oe[4] = {s.batch, s.q_heads, s.q_len, s.value_dim};
  InputPlan q = plan_input(p.arena, "q", &in.q, int8 ? &*c.q8 : nullptr, qe, bthd, f);
  // Paged: K/V live in the pages only; q.k and q.v keep their extents, data NULL.
  const Tensor none;
  InputPlan k = plan_input(p.arena, "k", paged ? &none : &in.k, int8 ? &*c.k8 : nullptr, ke, bthd, f);
  InputPlan v = plan_input(p.arena, "v", paged ? &none : &in.v, int8 ? &*c.v8 : nullptr, ve, bthd, f);
  std::optional<PagedPlan> pages;
  if (paged) pages = plan_paged(p.arena, c, f);
  MaskPlan mask = plan_mask(p.arena, c.received.core.mask, s);
  plan_output(p, oe, bthd);
  p.out_shape = {s.batch, s.q_heads, s.q_len, s.value_dim};
  if ((d.features & HR_FEATURE_SPLIT_PARTIALS) != 0) {
    p.num_splits = (s.kv_len + d.split_kv_len - 1) / d.split_kv_len;
    const auto rows = static_cast<std::size_t>(p.num_splits * s.batch * s.q_heads * s.q_len);
    p.partial_slot = p.arena.add("o_partials", Role::output, rows * static_cast<std::size_t>(s.value_dim) * item_size(p.output_format));
    p.lse_partial_slot = p.arena.add("lse_partials", Role::output, rows * sizeof(float));
  }
  const std::vector<float>& sinks = c.received.core.sinks;
  std::optional<std::size_t> sinks_slot;
  if (!sinks.empty()) sinks_slot = p.arena.add("sinks", Role::input, sinks.size() * sizeof(float));
  const Mask& case_mask = c.received.core.mask;
  std::size_t cu_slot[2] = {0, 0};
  if (case_mask.is_varlen()) {
    cu_slot[0] = p.arena.add("cu_q_lens", Role::input, case_mask.cu_q_lens.size() * sizeof(std::int64_t));
    cu_slot[1] = p.arena.add("cu_kv_lens", Role::input, case_mask.cu_kv_lens.size() * sizeof(std::int64_t));
  }
  if (d.returns_lse) {
    p.lse_slot = p.arena.add("lse", Role::output, static_cast<std::size_t>(s.batch * s.q_heads * s.q_len) * sizeof(float));
  }
  p.arena.allocate();
  hr_core_problem& cp = p.core;
  // A packed batch is told as N sequences of at most the largest lengths; its
  // tensors keep the case's extents [1, H, total, D] (kernel_abi.h, varlen.h).
  const CoreShape told = declared_shape(s, case_mask);
  cp.batch = told.batch, cp.q_heads = s.q_heads, cp.kv_heads = s.kv_heads;
  cp.q_len = told.q_len, cp.kv_len = told.kv_len, cp.key_dim = s.key_dim, cp.value_dim = s.value_dim;
  cp.scale = c.received.core.scale;
  cp.mask = fill_mask(p.arena, mask);
  cp.q = fill_input(p.arena, q, f);
  cp.k = fill_input(p.arena, k, f);
  cp.v = fill_input(p.arena, v, f);
  cp.o = fill_output(p);
  if (pages) {
    cp.features |= HR_FEATURE_PAGED_KV;
    cp.paged = fill_paged(p.arena, *pages, c.received.core, f);
  }
  if (p.num_splits > 0) {
    cp.features |= HR_FEATURE_SPLIT_PARTIALS;
    const std::int64_t pe[4] = {p.num_splits, s.batch * s.q_heads, s.q_len, s.value_dim};
    fill_unwritten(p.output_format, p.arena.data(p.partial_slot), count(pe));
    cp.o_partials.data = p.arena.data(p.partial_slot);
    cp.o_partials.format = abi_format(p.output_format);
    std::memcpy(cp.o_partials.extents, pe, sizeof cp.o_partials.extents);
    set_strides(pe, false, cp.o_partials.strides);
    fill_unwritten(Format::float32, p.arena.data(p.lse_partial_slot), p.arena.bytes(p.lse_partial_slot) / sizeof(float));
    cp.lse_partials = reinterpret_cast<float*>(p.arena.data(p.lse_partial_slot));
    cp.num_splits = p.num_splits;
  }
  if (c.received.core.mask.has_window()) {
    cp.features |= HR_FEATURE_WINDOW;
    cp.window_left = c.received.core.mask.window_left;
    cp.window_right = c.received.core.mask.window_right;
  }
  if (case_mask.is_varlen()) {
    cp.features |= HR_FEATURE_VARLEN;
    auto* q_dst = reinterpret_cast<std::int64_t*>(p.arena.data(cu_slot[0]));
    auto* kv_dst = reinterpret_cast<std::int64_t*>(p.arena.data(cu_slot[1]));
    std::copy(case_mask.cu_q_lens.begin(), case_mask.cu_q_lens.end(), q_dst);
    std::copy(case_mask.cu_kv_lens.begin(), case_mask.cu_kv_lens.end(), kv_dst);
    cp.cu_q_lens = q_dst;
    cp.cu_kv_lens = kv_dst;
  }
  if (c.received.core.has_softcap()) {
    cp.features |= HR_FEATURE_SOFTCAP;
    cp.softcap = c.received.core.softcap;
  }
  if (sinks_slot) {
    cp.features |= HR_FEATURE_SINKS;
    auto* dst = reinterpret_cast<float*>(p.arena.data(*sinks_slot));
    std::copy(sinks.begin(), sinks.end(), dst);
    cp.sinks = dst;
  }
  if (p.lse_slot) {
    fill_unwritten(Format::float32, p.arena.data(*p.lse_slot), p.arena.bytes(*p.lse_slot) / sizeof(float));
    cp.lse = reinterpret_cast<float*>(p.arena.data(*p.lse_slot));
  }
}

void pack_block(const ReceivedCase& c, const KernelDeclaration& d, PackedCall& p) {
  const BlockShape& s = c.received.block.shape;
  const BlockInputs& in = c.received.block_inputs;
  const Format f = d.input_format;
  const std::int64_t xq[4] = {1, s.batch, s.q_len, s.model_dim};
  const std::int64_t xkv[4] = {1, s.batch, s.kv_len, s.model_dim};
  const std::int64_t wq[4] = {1, 1, s.model_dim, s.q_heads * s.key_dim};
  const std::int64_t wk[4] = {1, 1, s.model_dim, s.kv_heads * s.key_dim};
  const std::int64_t wv[4] = {1, 1, s.model_dim, s.kv_heads * s.value_dim};
  const std::int64_t wo[4] = {1, 1, s.q_heads * s.value_dim, s.model_dim};
  const std::int64_t bq[4] = {1, 1, 1, s.q_heads * s.key_dim};
  const std::int64_t bk[4] = {1, 1, 1, s.kv_heads * s.key_dim};
  const std::int64_t bv[4] = {1, 1, 1, s.kv_heads * s.value_dim};
  const std::int64_t bo[4] = {1, 1, 1, s.model_dim};
  InputPlan x_q = plan_input(p.arena, "x_q", &in.x_q, nullptr, xq, false, f);
  InputPlan x_kv = plan_input(p.arena, "x_kv", &in.x_kv, nullptr, xkv, false, f);
  InputPlan w_q = plan_input(p.arena, "w_q", &in.w_q, nullptr, wq, false, f);
  InputPlan w_k = plan_input(p.arena, "w_k", &in.w_k, nullptr, wk, false, f);
  InputPlan w_v = plan_input(p.arena, "w_v", &in.w_v, nullptr, wv, false, f);
  InputPlan w_o = plan_input(p.arena, "w_o", &in.w_o, nullptr, wo, false, f);
  InputPlan b_q = plan_input(p.arena, "b_q", &in.b_q, nullptr, bq, false, f);
  InputPlan b_k = plan_input(p.arena, "b_k", &in.b_k, nullptr, bk, false, f);
  InputPlan b_v = plan_input(p.arena, "b_v", &in.b_v, nullptr, bv, false, f);
  InputPlan b_o = plan_input(p.arena, "b_o", &in.b_o, nullptr, bo, false, f);
  MaskPlan mask = plan_mask(p.arena, c.received.block.mask, s.core());
  const std::int64_t ye[4] = {1, s.batch, s.q_len, s.model_dim};
  plan_output(p, ye, false);
  p.out_shape = {s.batch, s.q_len, s.model_dim};
  p.arena.allocate();
  hr_block_problem& bp = p.block;
  bp.batch = s.batch, bp.q_len = s.q_len, bp.kv_len = s.kv_len, bp.model_dim = s.model_dim;
  bp.q_heads = s.q_heads, bp.kv_heads = s.kv_heads, bp.key_dim = s.key_dim, bp.value_dim = s.value_dim;
  bp.scale = c.received.block.scale;
  bp.mask = fill_mask(p.arena, mask);
  bp.x_q = fill_input(p.arena, x_q, f);
  bp.x_kv = fill_input(p.arena, x_kv, f);
  bp.w_q = fill_input(p.arena, w_q, f);
  bp.w_k = fill_input(p.arena, w_k, f);
  bp.w_v = fill_input(p.arena, w_v, f);
  bp.w_o = fill_input(p.arena, w_o, f);
  bp.b_q = fill_input(p.arena, b_q, f);
  bp.b_k = fill_input(p.arena, b_k, f);
  bp.b_v = fill_input(p.arena, b_v, f);
  bp.b_o = fill_input(p.arena, b_o, f);
  bp.y = fill_output(p);
}

}  // namespace

PackedCall pack(const ReceivedCase& c, const KernelDeclaration& d) {
  check_received(c, d);
  PackedCall p;
  p.level = d.level;
  p.output_format = d.output_format;
  if (d.level == Level::core) {
    pack_core(c, d, p);
  } else {
    pack_block(c, d, p);
  }
  return p;
}

Tensor unpack_output(const PackedCall& p) {
  Tensor out(p.out_shape);
  const unsigned char* src = p.arena.data(p.out_slot);
  const std::size_t n = item_size(p.output_format);
  for_each_element(p.out_extents, p.out_strides, [&](std::size_t i, std::size_t at) {
    out.values[i] = load_element(p.output_format, src + at * n);
  });
  return out;
}

void unpack_partials(const PackedCall& p, Tensor& o_partials, Tensor& lse_partials) {
  o_partials = Tensor{};
  lse_partials = Tensor{};
  if (p.num_splits == 0) return;
  const hr_core_problem& cp = p.core;
  o_partials = Tensor({p.num_splits, cp.batch * cp.q_heads, cp.q_len, cp.value_dim});
  lse_partials = Tensor({p.num_splits, cp.batch, cp.q_heads, cp.q_len});
  const unsigned char* src = p.arena.data(p.partial_slot);
  const std::size_t n = item_size(p.output_format);
  for (std::size_t i = 0; i < o_partials.values.size(); ++i) o_partials.values[i] = load_element(p.output_format, src + i * n);
  const unsigned char* lse = p.arena.data(p.lse_partial_slot);
  for (std::size_t i = 0; i < lse_partials.values.size(); ++i)
    lse_partials.values[i] = load_element(Format::float32, lse + i * sizeof(float));
}

std::int64_t count_unwritten(const PackedCall& p, std::int64_t* first) {
  const unsigned char* src = p.arena.data(p.out_slot);
  const std::size_t n = item_size(p.output_format);
  std::int64_t count = 0;
  std::size_t lowest = static_cast<std::size_t>(-1);
  for_each_element(p.out_extents, p.out_strides, [&](std::size_t i, std::size_t at) {
    if (!is_unwritten(p.output_format, src + at * n)) return;
    ++count;
    lowest = std::min(lowest, i);
  });
  *first = count == 0 ? -1 : static_cast<std::int64_t>(lowest);
  return count;
}

PackedBackward pack_backward(const ReceivedCase& c, const KernelDeclaration& d, const Tensor& o, const Tensor& lse) {
  check_received(c, d);
  const CoreShape& s = c.received.core.shape;
  const auto fail = [&](const std::string& why) {
    throw std::invalid_argument("backward of kernel \"" + d.name + "\" on case \"" + c.received.name + "\": " + why);
  };
  if (!d.backward) fail("the kernel has no backward entry");
  if (d.level != Level::core) fail("backward calls are core level");
  if (c.received.d_o.shape != std::vector<std::int64_t>{s.batch, s.q_heads, s.q_len, s.value_dim})
    fail("the case carries no dO of shape [B, Hq, Tq, Dv]");
  if (o.shape != c.received.d_o.shape) fail("O is not shaped [B, Hq, Tq, Dv]");
  if (lse.shape != std::vector<std::int64_t>{s.batch, s.q_heads, s.q_len}) fail("lse is not shaped [B, Hq, Tq]");
  PackedBackward p;
  p.output_format = d.output_format;
  const CoreInputs& in = c.received.core_inputs;
  const bool bthd = (d.layouts & HR_LAYOUT_BHTD) == 0;
  const Format f = d.input_format;
  const std::int64_t qe[4] = {s.batch, s.q_heads, s.q_len, s.key_dim};
  const std::int64_t ke[4] = {s.batch, s.kv_heads, s.kv_len, s.key_dim};
  const std::int64_t ve[4] = {s.batch, s.kv_heads, s.kv_len, s.value_dim};
  const std::int64_t oe[4] = {s.batch, s.q_heads, s.q_len, s.value_dim};
  InputPlan q = plan_input(p.arena, "q", &in.q, nullptr, qe, bthd, f);
  InputPlan k = plan_input(p.arena, "k", &in.k, nullptr, ke, bthd, f);
  InputPlan v = plan_input(p.arena, "v", &in.v, nullptr, ve, bthd, f);
  InputPlan op = plan_input(p.arena, "o", &o, nullptr, oe, bthd, d.output_format);
  InputPlan dop = plan_input(p.arena, "d_o", &c.received.d_o, nullptr, oe, bthd, f);
  const std::size_t lse_slot = p.arena.add("lse", Role::input, lse.values.size() * sizeof(float));
  MaskPlan mask = plan_mask(p.arena, c.received.core.mask, s);
  const char* names[3] = {"d_q", "d_k", "d_v"};
  const std::int64_t* extents[3] = {qe, ke, ve};
  for (int g = 0; g < 3; ++g) {
    std::memcpy(p.grad_extents[g], extents[g], sizeof p.grad_extents[g]);
    set_strides(p.grad_extents[g], bthd, p.grad_strides[g]);
    p.grad_slot[g] = p.arena.add(names[g], Role::output, count(extents[g]) * item_size(d.output_format));
  }
  const Mask& m = c.received.core.mask;
  if ((d.backward_flags & HR_BACKWARD_BIAS_GRAD) != 0 && m.kind == MaskKind::bias) {
    p.bias_shape = m.bias.shape;
    p.bias_slot = p.arena.add("d_bias", Role::output, m.bias.values.size() * sizeof(float));
  }
  p.arena.allocate();
  hr_backward_problem& bp = p.problem;
  hr_core_problem& cp = bp.forward;
  cp.batch = s.batch, cp.q_heads = s.q_heads, cp.kv_heads = s.kv_heads;
  cp.q_len = s.q_len, cp.kv_len = s.kv_len, cp.key_dim = s.key_dim, cp.value_dim = s.value_dim;
  cp.scale = c.received.core.scale;
  cp.mask = fill_mask(p.arena, mask);
  cp.q = fill_input(p.arena, q, f);
  cp.k = fill_input(p.arena, k, f);
  cp.v = fill_input(p.arena, v, f);
  cp.window_left = -1;
  cp.window_right = -1;
  if (c.received.core.mask.has_window()) {
    cp.features |= HR_FEATURE_WINDOW;
    cp.window_left = c.received.core.mask.window_left;
    cp.window_right = c.received.core.mask.window_right;
  }
  bp.o = fill_input(p.arena, op, d.output_format);
  bp.d_o = fill_input(p.arena, dop, f);
  auto* lse_dst = reinterpret_cast<float*>(p.arena.data(lse_slot));
  for (std::size_t i = 0; i < lse.values.size(); ++i) lse_dst[i] = static_cast<float>(lse.values[i]);
  bp.lse = lse_dst;
  hr_out_tensor* outs[3] = {&bp.d_q, &bp.d_k, &bp.d_v};
  for (int g = 0; g < 3; ++g) {
    fill_unwritten(d.output_format, p.arena.data(p.grad_slot[g]), count(p.grad_extents[g]));
    outs[g]->data = p.arena.data(p.grad_slot[g]);
    outs[g]->format = abi_format(d.output_format);
    std::memcpy(outs[g]->extents, p.grad_extents[g], sizeof outs[g]->extents);
    std::memcpy(outs[g]->strides, p.grad_strides[g], sizeof outs[g]->strides);
  }
  if (p.bias_slot) {
    fill_unwritten(Format::float32, p.arena.data(*p.bias_slot), p.arena.bytes(*p.bias_slot) / sizeof(float));
    bp.d_bias = reinterpret_cast<float*>(p.arena.data(*p.bias_slot));
  }
  return p;
}

void unpack_gradients(const PackedBackward& p, BackwardRun& r) {
  Tensor* outs[3] = {&r.d_q, &r.d_k, &r.d_v};
  const std::size_t n = item_size(p.output_format);
  for (int g = 0; g < 3; ++g) {
    const std::int64_t* e = p.grad_extents[g];
    *outs[g] = Tensor({e[0], e[1], e[2], e[3]});
    const unsigned char* src = p.arena.data(p.grad_slot[g]);
    for_each_element(e, p.grad_strides[g], [&](std::size_t i, std::size_t at) {
      outs[g]->values[i] = load_element(p.output_format, src + at * n);
    });
  }
  r.d_bias = Tensor{};
  if (p.bias_slot) {
    r.d_bias = Tensor(p.bias_shape);
    const unsigned char* src = p.arena.data(*p.bias_slot);
    for (std::size_t i = 0; i < r.d_bias.values.size(); ++i)
      r.d_bias.values[i] = load_element(Format::float32, src + i * sizeof(float));
  }
}

Tensor unpack_lse(const PackedCall& p) {
  if (!p.lse_slot) return Tensor{};
  // [B, Hq, Tq] of the case; [1, Hq, total] for a packed batch, whose p.core says N and the largest Tq.
  Tensor lse({p.out_shape[0], p.out_shape[1], p.out_shape[2]});
  const unsigned char* src = p.arena.data(*p.lse_slot);
  for (std::size_t i = 0; i < lse.values.size(); ++i) lse.values[i] = load_element(Format::float32, src + i * sizeof(float));
  return lse;
}

}  // namespace headroom::attach_detail
