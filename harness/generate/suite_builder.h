// headroom — building a suite's request list (suite.h): the builder and the production sections.
#pragma once

#include <array>
#include <cstdint>
#include <optional>
#include <string>
#include <string_view>
#include <utility>
#include <vector>

#include "headroom/generate.h"

namespace headroom::generate_internal {

class SuiteBuilder {
 public:
  void add(std::string_view family, std::uint64_t seed, int size, std::optional<CoreShape> shape = std::nullopt,
           std::optional<MaskKind> mask = std::nullopt, std::optional<std::int64_t> model_dim = std::nullopt) {
    CaseRequest r;
    r.family = std::string(family);
    r.seed = seed;
    r.size = size;
    r.shape = shape;
    r.mask = mask;
    r.model_dim = model_dim;
    out_.push_back(std::move(r));
  }
  std::vector<CaseRequest> take() { return std::move(out_); }

 private:
  std::vector<CaseRequest> out_;
};

inline CoreShape shape(std::int64_t b, std::int64_t hq, std::int64_t hkv, std::int64_t tq, std::int64_t tk,
                       std::int64_t dk, std::int64_t dv) {
  return CoreShape{b, hq, hkv, tq, tk, dk, dv};
}

/// The core families whose values are adversarial at any fixed shape: the
/// ones production sections and user shapes (`--shape`, `--shapes`) run.
/// (tile_edges, long_sequence, ragged and masks choose their own lengths;
/// block_gaussian is the block level.)
inline constexpr std::string_view kShapeFamilies[] = {
    "gaussian",          "large_logits",        "near_ties",     "dominant_key",      "outlier_channels",
    "sparse_outliers",   "massive_activations", "common_offset", "cancelling_values", "attention_sink",
    "repeated_maxima",   "format_edges"};

// The head dims kernels specialise for (common practice: 64, 80, 96, 128,
// 192, 256 are the sizes of released decoder models; 192/128 and 128/64 are
// the Dk ≠ Dv pairs of latent-attention and distilled models).
inline constexpr std::array<std::pair<std::int64_t, std::int64_t>, 8> kHeadDims{
    {{64, 64}, {80, 80}, {96, 96}, {128, 128}, {192, 192}, {256, 256}, {192, 128}, {128, 64}}};

// Group sizes 1, 2, 4, 8, 16 at realistic head counts (Hq 32 over Hkv 8, 4, 2).
inline constexpr std::array<std::pair<std::int64_t, std::int64_t>, 6> kGroups{
    {{8, 8}, {16, 8}, {32, 8}, {32, 4}, {32, 2}, {16, 1}}};

/// How big a production section is: `standard` or `deep`.
enum class Depth : unsigned char { standard, deep };

/// Adds the production-shape sections (suite.h) at `depth`, seeds from `base` up.
void production_sections(SuiteBuilder& b, Depth depth, std::uint64_t base);

}  // namespace headroom::generate_internal
