// headroom — a recipe: the few numbers from which a generated case is rebuilt exactly.
//
// Generation draws a Recipe from rc::Random (shape, mask kind, family knobs,
// a value seed); realize() turns it into a Case as a pure function. Shrinking
// edits the recipe (fewer tokens, smaller dims, knobs towards 0, fewer value
// bits) and realizes again, so every shrink is itself a valid, reproducible case.
#pragma once

#include <rapidcheck/Random.h>

#include <array>
#include <cstdint>
#include <initializer_list>
#include <span>
#include <string_view>
#include <vector>

#include "headroom/case.h"
#include "headroom/problem.h"
#include "values.h"

namespace headroom::generate_internal {

struct Recipe {
  std::size_t family = 0;  ///< index into kFamilies (families.h)
  Level level = Level::core;
  CoreShape shape;             ///< the attention's shape (at block level, the one inside the block)
  std::int64_t model_dim = 1;  ///< block level only
  MaskKind mask = MaskKind::none;
  std::array<int, 3> knobs{};  ///< family parameters; 0 is each knob's simplest setting
  int value_bits = 24;         ///< significant bits of the base noise (24: full float32)
  std::uint64_t value_seed = 0;
  bool operator==(const Recipe&) const = default;

  Noise noise() const { return Noise(value_seed, value_bits); }
};

/// Draws recipe fields from RapidCheck's splittable generator.
class Draw {
 public:
  explicit Draw(rc::Random r) : r_(r) {}
  std::uint64_t bits() { return r_.next(); }
  /// Returns: an integer uniform in [lo, hi]. Preconditions: lo ≤ hi.
  std::int64_t uniform(std::int64_t lo, std::int64_t hi) {
    return lo + static_cast<std::int64_t>(bits() % static_cast<std::uint64_t>(hi - lo + 1));
  }
  int uniform_int(int lo, int hi) { return static_cast<int>(uniform(lo, hi)); }
  bool chance(int one_in) { return uniform(1, one_in) == 1; }
  template <class T>
  T pick(std::initializer_list<T> options) {
    return options.begin()[uniform(0, static_cast<std::int64_t>(options.size()) - 1)];
  }

 private:
  rc::Random r_;
};

/// One family's implementation; its documentation is its FamilyInfo (families.h).
struct FamilyImpl {
  std::string_view name;
  /// The family's own mask kind for this draw (nullptr: none). A request may override it.
  MaskKind (*choose_mask)(Draw&) = nullptr;
  /// Sets shape, model_dim and knobs for `size`; r.mask is already final. A
  /// requested shape replaces the drawn one afterwards, so realize must accept any valid shape.
  void (*sample)(Draw&, int size, Recipe& r) = nullptr;
  /// Fills scale and input tensors of `c` (level, shape and mask are set).
  void (*realize)(const Recipe& r, Case& c) = nullptr;
  /// Shrink constraint: whether a smaller recipe still belongs to the family
  /// (nullptr: every valid recipe does).
  bool (*keeps)(const Recipe& r) = nullptr;
  /// Lengths shrinks may move to (nullptr: any smaller length).
  std::span<const std::int64_t> (*length_menu)() = nullptr;
  /// Masks of this family carry the hard rows (fully masked, single last key).
  bool adversarial_mask = false;
};

/// Returns: the implementations, in the order of kFamilies.
std::span<const FamilyImpl> family_impls();

// The family groups, one file each.
std::vector<FamilyImpl> baseline_families();  // gaussian, long_sequence, tile_edges, ragged, block_gaussian
std::vector<FamilyImpl>
score_families();  // large_logits, near_ties, dominant_key, attention_sink, repeated_maxima, common_offset
std::vector<FamilyImpl> activation_families();  // outlier_channels, sparse_outliers, massive_activations
std::vector<FamilyImpl> edge_families();        // format_edges, masks, cancelling_values
std::vector<FamilyImpl> window_families();      // sliding_window
std::vector<FamilyImpl> fp8_families();         // fp8_scales
std::vector<FamilyImpl> score_feature_families();  // capped_logits, dominant_sinks
std::vector<FamilyImpl> varlen_families();          // varlen_edges
std::vector<FamilyImpl> paged_families();          // paged_decode
std::vector<FamilyImpl> gradient_families();       // gradient_cancellation

// ---- shared helpers (shapes.cpp) ----

/// Returns: max(1, round(size · at_nominal / 100)): an extent that reaches
/// `at_nominal` at RapidCheck's nominal size 100 and grows linearly.
std::int64_t size_cap(int size, std::int64_t at_nominal);

/// Draws a general core shape for `size`: B ≤ 2, Hkv ≤ 2, Hq ≤ 4 (grouped
/// queries included), Tq, Tk ≤ size_cap(size, 64), head dims ≤ size_cap(size, 64),
/// half of them the customary powers of two.
CoreShape sample_core_shape(Draw& d, int size);

/// Sets r.shape = sample_core_shape(d, size) and leaves the knobs at 0.
void sample_plain(Draw& d, int size, Recipe& r);

/// Returns: float32(c / sqrt(Dk)): the customary 1/sqrt(d_k) softmax scale
/// (Vaswani et al. 2017, §3.2.1) times c, as the kernel will receive it.
float softmax_scale(std::int64_t key_dim, double c = 1.0);

/// Returns: the mask of kind r.mask for r.shape; adversarial masks carry a
/// fully masked row and a row whose only visible key is the last (masks.cpp).
Mask build_mask(const Recipe& r, bool adversarial);

/// Returns: Q, K, V of r.shape with every element σ·N(0, 1), float32.
CoreInputs gaussian_inputs(const Recipe& r, double sigma);

}  // namespace headroom::generate_internal
