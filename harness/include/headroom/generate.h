// headroom — adversarial cases from (family, seed, size), shrinkable through RapidCheck.
//
// A case is reproducible from its request: make_case runs the family's
// rc::Gen<Case> with rc::Random(seed) at the given size, then follows the
// request's shrink path. Shrinking (the Shrinkable's shrinks(), most
// aggressive first) gives fewer batches and heads, fewer tokens, smaller head
// and model dims, family knobs towards their simplest setting and base values
// with fewer significant bits, and last fewer heads at the same group size; every shrink is a valid case (validate() is
// empty) whose surviving elements keep their values, and whose provenance
// command recreates it.
#pragma once

#include <rapidcheck/Gen.h>
#include <rapidcheck/Random.h>
#include <rapidcheck/Shrinkable.h>

#include <cstdint>
#include <optional>
#include <string>
#include <string_view>
#include <vector>

#include "headroom/case.h"
#include "headroom/problem.h"

namespace headroom {

/// RapidCheck's nominal size (rc::kNominalSize): at this size tokens stay ≤ 64.
inline constexpr int kDefaultSize = 100;
inline constexpr int kMaxSize = 1000;
/// Per-tensor element limit for requests: 2^26 doubles is 512 MiB.
inline constexpr std::int64_t kMaxTensorElements = std::int64_t{1} << 26;

struct CaseRequest {
  std::string family;  ///< a name from families.h
  std::uint64_t seed = 0;
  int size = kDefaultSize;                ///< in [0, kMaxSize]
  std::optional<CoreShape> shape;         ///< fixes the attention's shape (also inside a block)
  std::optional<MaskKind> mask;           ///< overrides the family's mask kind
  std::optional<Level> level;             ///< must match the family's level when given
  std::optional<std::int64_t> model_dim;  ///< block level only; default Hq·Dk when the shape is fixed
  std::vector<int> shrink_path;           ///< successive indices into shrinks(), applied after generation
};

/// Returns: the case of `req`, bit-identical on every call: name
/// "<family>-s<seed>-z<size>-<B>x<Hq>x<Hkv>x<Tq>x<Tk>x<Dk>x<Dv>[-m<Dm>]-<mask>[-p<path>]",
/// provenance family, seed and the `headroom case make` command that recreates it.
/// Throws: InputError (file "command line", place the flag) for an unknown family, a size outside
/// [0, kMaxSize], a level the family does not make, an invalid shape (extents
/// ≥ 1, Hq a multiple of Hkv, ≤ 2^26 elements per tensor), a model dim without
/// block level, or a shrink path index past the shrinks there are.
Case make_case(const CaseRequest& req);

/// What make_case(req) gives, without its values: cheap (no tensor is made).
struct CaseOutline {
  std::string name;  ///< the case's name, as make_case gives it
  Level level = Level::core;
  CoreShape shape;   ///< the attention's shape (inside a block too)
  MaskKind mask = MaskKind::none;
  std::int64_t model_dim = 1;  ///< block level; 1 for core
};

/// Returns: the outline of make_case(req). Throws: InputError as make_case.
CaseOutline case_outline(const CaseRequest& req);

/// Returns: the family's generator with the request's shape, mask and level
/// fixed; req.seed, req.size and req.shrink_path are not used (the Random and
/// size passed to it are). Cases carry a replay command only when run with
/// rc::Random(req.seed) at req.size; inside an rc property the command says to
/// use RapidCheck's reproduce token. Throws: InputError as make_case, eagerly.
rc::Gen<Case> case_gen(const CaseRequest& req);

/// Returns: the generated case of `req` after its shrink path, with its shrink
/// tree, for a search loop that walks shrinks() itself. Each shrink's
/// provenance command extends the path by the shrink's index.
rc::Shrinkable<Case> shrinkable_case(const CaseRequest& req);

/// Returns: "<tool> case make --family F --seed S --size N [--level block]
/// [--shape B,Hq,Hkv,Tq,Tk,Dk,Dv] [--model-dim D] [--mask KIND]
/// [--shrink-path i,j,...] --out <out>"; `tool` is written as given (quote it).
std::string case_command(const CaseRequest& req, std::string_view out, std::string_view tool = "headroom");

/// Returns: the shape "B,Hq,Hkv,Tq,Tk,Dk,Dv" (seven integers ≥ 1, Hq a
/// multiple of Hkv). Throws: InputError naming `place` (e.g. "--shape").
CoreShape parse_core_shape(std::string_view text, std::string_view place = "--shape");

/// Returns: "B,Hq,Hkv,Tq,Tk,Dk,Dv", the text parse_core_shape reads.
std::string core_shape_text(const CoreShape& s);

}  // namespace headroom
