// headroom — helpers shared by the generator tests: scores, row kinds, case comparison.
#pragma once

#include <gtest/gtest.h>

#include <algorithm>
#include <cmath>
#include <string>
#include <vector>

#include "headroom/families.h"
#include "headroom/generate.h"
#include "headroom/input_error.h"

namespace headroom::test {

inline CaseRequest request(std::string family, std::uint64_t seed, int size = kDefaultSize) {
  CaseRequest r;
  r.family = std::move(family);
  r.seed = seed;
  r.size = size;
  return r;
}

inline const CoreShape& shape_of(const Case& c) { return c.core.shape; }

// The scaled score s·q·k + bias in double. Products of float32 values are
// exact in double; the sum of Dk of them is within Dk·2^-53 relative.
inline double score(const Case& c, std::int64_t b, std::int64_t h, std::int64_t i, std::int64_t j) {
  const CoreShape& s = c.core.shape;
  const std::int64_t g = kv_head_of(s, h);
  double dot = 0;
  for (std::int64_t d = 0; d < s.key_dim; ++d) dot += c.core_inputs.q.at(b, h, i, d) * c.core_inputs.k.at(b, g, j, d);
  return static_cast<double>(c.core.scale) * dot + c.core.mask.bias_at(b, h, i, j);
}

inline double ulp32(double x) {
  const float f = static_cast<float>(std::fabs(x));
  return static_cast<double>(std::nextafter(f, INFINITY)) - static_cast<double>(f);
}

inline bool is_float32(double x) { return static_cast<double>(static_cast<float>(x)) == x || std::isnan(x); }

inline std::vector<const Tensor*> tensors_of(const Case& c) {
  if (c.level == Level::core) {
    // dO, when the family makes one (gradient_cancellation), is checked like the inputs.
    if (!c.d_o.values.empty()) return {&c.core_inputs.q, &c.core_inputs.k, &c.core_inputs.v, &c.d_o};
    return {&c.core_inputs.q, &c.core_inputs.k, &c.core_inputs.v};
  }
  const BlockInputs& in = c.block_inputs;
  return {&in.x_q, &in.x_kv, &in.w_q, &in.w_k, &in.w_v, &in.w_o, &in.b_q, &in.b_k, &in.b_v, &in.b_o};
}

inline bool identical(const Case& a, const Case& b) {
  const auto ta = tensors_of(a), tb = tensors_of(b);
  if (ta.size() != tb.size()) return false;
  if (a.name != b.name || a.level != b.level || a.provenance.command != b.provenance.command) return false;
  for (std::size_t i = 0; i < ta.size(); ++i)
    if (!bit_identical(*ta[i], *tb[i])) return false;
  const Mask& ma = a.level == Level::core ? a.core.mask : a.block.mask;
  const Mask& mb = b.level == Level::core ? b.core.mask : b.block.mask;
  return ma.kind == mb.kind && ma.key_lengths == mb.key_lengths && bit_identical(ma.allowed, mb.allowed) &&
         bit_identical(ma.bias, mb.bias) && a.core.scale == b.core.scale && a.block.scale == b.block.scale;
}

inline std::vector<std::string> errors_of(const Case& c) {
  std::vector<std::string> out;
  const auto found = c.level == Level::core ? validate(c.core, c.core_inputs) : validate(c.block, c.block_inputs);
  for (const auto& e : found) out.push_back(e.message());
  return out;
}

// Calls f(b, h, i) for every query row that sees at least one key.
template <class F>
void each_visible_row(const Case& c, F&& f) {
  const CoreShape& s = c.core.shape;
  for (std::int64_t b = 0; b < s.batch; ++b)
    for (std::int64_t h = 0; h < s.q_heads; ++h)
      for (std::int64_t i = 0; i < s.q_len; ++i) {
        bool any = false;
        for (std::int64_t j = 0; j < s.kv_len && !any; ++j) any = c.core.mask.visible(s, b, h, i, j);
        if (any) f(b, h, i);
      }
}

// Lengths 1, t−1, t, t+1, 2t±1 for t in 16, 32, 64, 128.
inline constexpr std::int64_t kTileLengths[] = {1, 15, 16, 17, 31, 32, 33, 63, 64, 65, 127, 128, 129, 255, 257};

struct RowKinds {
  int fully_masked = 0, last_key_only = 0, very_negative = 0;
};

inline RowKinds row_kinds(const Case& c) {
  RowKinds k;
  const CoreShape& s = c.core.shape;
  for (std::int64_t b = 0; b < s.batch; ++b)
    for (std::int64_t h = 0; h < s.q_heads; ++h)
      for (std::int64_t i = 0; i < s.q_len; ++i) {
        int visible = 0;
        bool last = false, all_negative = true;
        for (std::int64_t j = 0; j < s.kv_len; ++j) {
          const bool v = c.core.mask.visible(s, b, h, i, j);
          visible += v;
          last = last || (v && j == s.kv_len - 1);
          all_negative = all_negative && c.core.mask.bias_at(b, h, i, j) == -60000.0;
        }
        k.fully_masked += visible == 0;
        k.last_key_only += visible == 1 && last;
        k.very_negative += all_negative;
      }
  return k;
}

template <class F>
std::string input_error_place(F&& f) {
  try {
    f();
  } catch (const InputError& e) {
    EXPECT_EQ(e.file(), "command line");
    EXPECT_FALSE(e.fix().empty());
    return e.place();
  }
  return "(no error)";
}

}  // namespace headroom::test
