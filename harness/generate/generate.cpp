// headroom — generation, shrinking and replay of adversarial cases (generate.h).
#include "headroom/generate.h"

#include <rapidcheck/seq/Create.h>
#include <rapidcheck/shrink/Shrink.h>
#include <rapidcheck/shrinkable/Create.h>

#include <charconv>
#include <memory>
#include <string>

#include "headroom/families.h"
#include "headroom/input_error.h"
#include "recipe.h"

namespace headroom {
namespace {

using generate_internal::Draw;
using generate_internal::FamilyImpl;
using generate_internal::Recipe;

constexpr const char* kCli = "command line";

const FamilyImpl& impl_of(std::size_t family) { return generate_internal::family_impls()[family]; }

// The product of extents, or -1 once it passes kMaxTensorElements.
std::int64_t bounded_product(std::initializer_list<std::int64_t> extents) {
  std::int64_t n = 1;
  for (std::int64_t e : extents) {
    if (e > kMaxTensorElements) return -1;
    n *= e;
    if (n > kMaxTensorElements) return -1;
  }
  return n;
}

void check_shape(const CoreShape& s, std::int64_t model_dim, bool block) {
  for (std::int64_t e : {s.batch, s.q_heads, s.kv_heads, s.q_len, s.kv_len, s.key_dim, s.value_dim, model_dim})
    if (e < 1)
      throw InputError(kCli, "--shape", "extent " + std::to_string(e) + " is below 1",
                       "give every extent as an integer ≥ 1");
  if (s.q_heads % s.kv_heads != 0)
    throw InputError(kCli, "--shape",
                     "Hq = " + std::to_string(s.q_heads) + " is not a multiple of Hkv = " + std::to_string(s.kv_heads),
                     "choose Hkv dividing Hq (grouped-query attention)");
  bool fits = bounded_product({s.batch, s.q_heads, s.q_len, s.key_dim}) > 0 &&
              bounded_product({s.batch, s.kv_heads, s.kv_len, s.key_dim}) > 0 &&
              bounded_product({s.batch, s.kv_heads, s.kv_len, s.value_dim}) > 0 &&
              bounded_product({s.batch, s.q_heads, s.q_len, s.kv_len}) > 0;
  if (block)
    fits = fits && bounded_product({s.batch, s.q_len, model_dim}) > 0 &&
           bounded_product({s.batch, s.kv_len, model_dim}) > 0 &&
           bounded_product({model_dim, s.q_heads, s.key_dim}) > 0 &&
           bounded_product({model_dim, s.q_heads, s.value_dim}) > 0;
  if (!fits)
    throw InputError(kCli, "--shape", "a tensor of this shape would exceed 2^26 elements",
                     "use smaller extents (the exact reference would not finish anyway)");
}

// Checks the request and returns its family's index.
std::size_t checked_family(const CaseRequest& req) {
  std::size_t index = 0;
  for (; index < std::size(kFamilies); ++index)
    if (kFamilies[index].name == req.family) break;
  if (index == std::size(kFamilies)) {
    std::string names;
    for (const FamilyInfo& f : kFamilies) names += (names.empty() ? "" : ", ") + std::string(f.name);
    throw InputError(kCli, "--family", "unknown family \"" + req.family + "\"", "use one of: " + names);
  }
  const Level level = kFamilies[index].level;
  if (req.size < 0 || req.size > kMaxSize)
    throw InputError(kCli, "--size",
                     "size " + std::to_string(req.size) + " is outside [0, " + std::to_string(kMaxSize) + "]",
                     "give a size in that range (100 is RapidCheck's nominal size)");
  if (req.level && *req.level != level)
    throw InputError(kCli, "--level",
                     "family " + req.family + " makes " + (level == Level::block ? "block" : "core") + "-level cases",
                     "drop --level, or choose a family of that level");
  if (req.model_dim && level != Level::block)
    throw InputError(kCli, "--model-dim", "family " + req.family + " makes core-level cases, which have no model dim",
                     "drop --model-dim, or choose block_gaussian");
  if (req.model_dim && *req.model_dim < 1)
    throw InputError(kCli, "--model-dim", "model dim " + std::to_string(*req.model_dim) + " is below 1",
                     "give an integer ≥ 1");
  if (req.shape)
    check_shape(*req.shape, req.model_dim.value_or(req.shape->q_heads * req.shape->key_dim), level == Level::block);
  return index;
}

Recipe sample_recipe(const CaseRequest& req, std::size_t family, const rc::Random& random, int size) {
  const FamilyImpl& f = impl_of(family);
  Draw d(random);
  Recipe r;
  r.family = family;
  r.level = kFamilies[family].level;
  // Draw order is part of case identity: seed, mask, then the family's own draws.
  r.value_seed = d.bits();
  r.mask = f.choose_mask ? f.choose_mask(d) : MaskKind::none;
  if (req.mask) r.mask = *req.mask;
  f.sample(d, size, r);
  if (req.shape) {
    r.shape = *req.shape;
    if (r.level == Level::block) r.model_dim = r.shape.q_heads * r.shape.key_dim;
  }
  if (req.model_dim) r.model_dim = *req.model_dim;
  if (r.level == Level::core) r.model_dim = 1;
  return r;
}

// ---- shrinking ----

std::vector<std::int64_t> toward(std::int64_t value, std::int64_t target) {
  std::vector<std::int64_t> out;
  auto seq = rc::shrink::towards<std::int64_t>(value, target);
  while (auto v = seq.next()) out.push_back(*v);
  return out;
}

std::vector<std::int64_t> length_shrinks(const FamilyImpl& f, std::int64_t n) {
  if (!f.length_menu) return toward(n, 1);
  std::vector<std::int64_t> out;
  for (std::int64_t m : f.length_menu())
    if (m < n) out.push_back(m);
  return out;
}

bool structurally_valid(const Recipe& r) {
  const CoreShape& s = r.shape;
  for (std::int64_t e : {s.batch, s.q_heads, s.kv_heads, s.q_len, s.kv_len, s.key_dim, s.value_dim, r.model_dim})
    if (e < 1) return false;
  return s.q_heads % s.kv_heads == 0 && r.value_bits >= 1;
}

// Every one-step simplification of r, most aggressive first within each field.
std::vector<Recipe> shrink_candidates(const Recipe& r) {
  const FamilyImpl& f = impl_of(r.family);
  // A request may fix a shape outside the family's constraint; its shrinks are then unconstrained.
  const bool constrained = f.keeps != nullptr && f.keeps(r);
  std::vector<Recipe> out;
  auto offer = [&](const Recipe& c) {
    if (c == r || !structurally_valid(c)) return;
    if (constrained && !f.keeps(c)) return;
    for (const Recipe& o : out)
      if (o == c) return;
    out.push_back(c);
  };
  auto edit = [&](auto&& change) {
    Recipe c = r;
    change(c);
    offer(c);
  };
  CoreShape s = r.shape;
  for (std::int64_t v : toward(s.batch, 1)) edit([&](Recipe& c) { c.shape.batch = v; });
  edit([&](Recipe& c) { c.shape.q_heads = c.shape.kv_heads = 1; });
  for (std::int64_t v : toward(s.q_heads, s.kv_heads)) edit([&](Recipe& c) { c.shape.q_heads = v; });
  for (std::int64_t v : toward(s.kv_heads, 1)) edit([&](Recipe& c) { c.shape.kv_heads = v; });
  for (std::int64_t v : length_shrinks(f, s.kv_len)) edit([&](Recipe& c) { c.shape.kv_len = v; });
  for (std::int64_t v : length_shrinks(f, s.q_len)) edit([&](Recipe& c) { c.shape.q_len = v; });
  for (std::int64_t v : toward(s.key_dim, 1)) edit([&](Recipe& c) { c.shape.key_dim = v; });
  for (std::int64_t v : toward(s.value_dim, 1)) edit([&](Recipe& c) { c.shape.value_dim = v; });
  if (r.level == Level::block)
    for (std::int64_t v : toward(r.model_dim, 1)) edit([&](Recipe& c) { c.model_dim = v; });
  for (std::size_t k = 0; k < r.knobs.size(); ++k)
    for (std::int64_t v : toward(r.knobs[k], 0)) edit([&](Recipe& c) { c.knobs[k] = static_cast<int>(v); });
  for (std::int64_t v : toward(r.value_bits, 1)) edit([&](Recipe& c) { c.value_bits = static_cast<int>(v); });
  // Fewer heads with the same group size (a kernel specialised per group keeps
  // failing): last, so the indices of the shrinks above, which saved shrink
  // paths name, do not move.
  const std::int64_t group = s.q_heads / s.kv_heads;
  for (std::int64_t v : toward(s.kv_heads, 1)) edit([&](Recipe& c) { c.shape.kv_heads = v, c.shape.q_heads = v * group; });
  return out;
}

// ---- realizing ----

struct Origin {
  CaseRequest request;  // shrink path cleared; each case adds its own
  bool replayable = true;
};

std::string path_text(const std::vector<int>& path, char sep) {
  std::string out;
  for (std::size_t i = 0; i < path.size(); ++i) out += (i ? std::string(1, sep) : "") + std::to_string(path[i]);
  return out;
}

std::string case_name(const Recipe& r, const Origin& o, const std::vector<int>& path) {
  const CoreShape& s = r.shape;
  std::string name = o.request.family;
  if (o.replayable) {
    name += "-s" + std::to_string(o.request.seed) + "-z" + std::to_string(o.request.size);
  } else {
    char hex[24];
    std::snprintf(hex, sizeof hex, "-r%016llx", static_cast<unsigned long long>(r.value_seed));
    name += hex;
  }
  name += "-" + std::to_string(s.batch) + "x" + std::to_string(s.q_heads) + "x" + std::to_string(s.kv_heads) + "x" +
          std::to_string(s.q_len) + "x" + std::to_string(s.kv_len) + "x" + std::to_string(s.key_dim) + "x" +
          std::to_string(s.value_dim);
  if (r.level == Level::block) name += "-m" + std::to_string(r.model_dim);
  name += "-" + std::string(mask_kind_name(r.mask));
  if (!path.empty()) name += "-p" + path_text(path, '.');
  return name;
}

Case realize(const Recipe& r, const Origin& o, const std::vector<int>& path) {
  const FamilyImpl& f = impl_of(r.family);
  Case c;
  c.level = r.level;
  c.source_format = Format::float32;
  const Mask mask = generate_internal::build_mask(r, f.adversarial_mask);
  if (r.level == Level::core) {
    c.core.shape = r.shape;
    c.core.mask = mask;
  } else {
    const CoreShape& s = r.shape;
    c.block.shape = BlockShape{s.batch, s.q_len, s.kv_len, r.model_dim, s.q_heads, s.kv_heads, s.key_dim, s.value_dim};
    c.block.mask = mask;
  }
  f.realize(r, c);
  c.name = case_name(r, o, path);
  c.provenance.family = o.request.family;
  if (o.replayable) {
    CaseRequest again = o.request;
    again.shrink_path = path;
    c.provenance.seed = o.request.seed;
    c.provenance.command = case_command(again, c.name);
  } else {
    c.provenance.command = "generated inside a RapidCheck property: replay it with the RC_PARAMS reproduce token";
  }
  return c;
}

rc::Shrinkable<Case> shrinkable_at(const Recipe& r, std::shared_ptr<const Origin> origin, std::vector<int> path) {
  return rc::shrinkable::lambda([r, origin, path] { return realize(r, *origin, path); },
                                [r, origin, path] {
                                  std::vector<rc::Shrinkable<Case>> shrinks;
                                  const std::vector<Recipe> candidates = shrink_candidates(r);
                                  for (std::size_t i = 0; i < candidates.size(); ++i) {
                                    std::vector<int> next = path;
                                    next.push_back(static_cast<int>(i));
                                    shrinks.push_back(shrinkable_at(candidates[i], origin, std::move(next)));
                                  }
                                  return rc::seq::fromContainer(std::move(shrinks));
                                });
}

}  // namespace

rc::Gen<Case> case_gen(const CaseRequest& req) {
  const std::size_t family = checked_family(req);
  CaseRequest fixed = req;
  fixed.shrink_path.clear();
  return rc::Gen<Case>([fixed, family](const rc::Random& random, int size) {
    auto origin = std::make_shared<Origin>();
    origin->request = fixed;
    origin->replayable = random == rc::Random(fixed.seed) && size == fixed.size;
    return shrinkable_at(sample_recipe(fixed, family, random, size), std::move(origin), {});
  });
}

namespace {

// The recipe of `req` after its shrink path.
Recipe recipe_of(const CaseRequest& req) {
  const std::size_t family = checked_family(req);
  Recipe r = sample_recipe(req, family, rc::Random(req.seed), req.size);
  for (std::size_t step = 0; step < req.shrink_path.size(); ++step) {
    const std::vector<Recipe> candidates = shrink_candidates(r);
    const int i = req.shrink_path[step];
    if (i < 0 || static_cast<std::size_t>(i) >= candidates.size())
      throw InputError(kCli, "--shrink-path",
                       "index " + std::to_string(i) + " at step " + std::to_string(step + 1) + " is past the " +
                           std::to_string(candidates.size()) + " shrinks there",
                       "use a path recorded in a case's provenance");
    r = candidates[static_cast<std::size_t>(i)];
  }
  return r;
}

std::shared_ptr<Origin> origin_of(const CaseRequest& req) {
  auto origin = std::make_shared<Origin>();
  origin->request = req;
  origin->request.shrink_path.clear();
  return origin;
}

}  // namespace

rc::Shrinkable<Case> shrinkable_case(const CaseRequest& req) {
  return shrinkable_at(recipe_of(req), origin_of(req), req.shrink_path);
}

CaseOutline case_outline(const CaseRequest& req) {
  const Recipe r = recipe_of(req);
  return {case_name(r, *origin_of(req), req.shrink_path), r.level, r.shape, r.mask, r.model_dim};
}

Case make_case(const CaseRequest& req) { return shrinkable_case(req).value(); }

std::string core_shape_text(const CoreShape& s) {
  return std::to_string(s.batch) + "," + std::to_string(s.q_heads) + "," + std::to_string(s.kv_heads) + "," +
         std::to_string(s.q_len) + "," + std::to_string(s.kv_len) + "," + std::to_string(s.key_dim) + "," +
         std::to_string(s.value_dim);
}

std::string case_command(const CaseRequest& req, std::string_view out, std::string_view tool) {
  std::string cmd = std::string(tool) + " case make --family " + req.family + " --seed " + std::to_string(req.seed) + " --size " +
                    std::to_string(req.size);
  if (req.level) cmd += *req.level == Level::block ? " --level block" : " --level core";
  if (req.shape) cmd += " --shape " + core_shape_text(*req.shape);
  if (req.model_dim) cmd += " --model-dim " + std::to_string(*req.model_dim);
  if (req.mask) cmd += " --mask " + std::string(mask_kind_name(*req.mask));
  if (!req.shrink_path.empty()) cmd += " --shrink-path " + path_text(req.shrink_path, ',');
  cmd += " --out ";
  cmd += out;
  return cmd;
}

CoreShape parse_core_shape(std::string_view text, std::string_view place) {
  auto fail = [&](const std::string& problem) -> InputError {
    return InputError(kCli, std::string(place), problem,
                      "write seven integers ≥ 1 B,Hq,Hkv,Tq,Tk,Dk,Dv, e.g. 1,4,2,16,16,64,64");
  };
  std::vector<std::int64_t> v;
  std::size_t start = 0;
  while (true) {
    const std::size_t comma = text.find(',', start);
    const std::string_view field =
        text.substr(start, comma == std::string_view::npos ? std::string_view::npos : comma - start);
    std::int64_t x = 0;
    const auto [end, ec] = std::from_chars(field.data(), field.data() + field.size(), x);
    if (field.empty() || ec != std::errc{} || end != field.data() + field.size())
      throw fail("\"" + std::string(field) + "\" in \"" + std::string(text) + "\" is not an integer");
    if (x < 1) throw fail("extent " + std::to_string(x) + " in \"" + std::string(text) + "\" is below 1");
    v.push_back(x);
    if (comma == std::string_view::npos) break;
    start = comma + 1;
  }
  if (v.size() != 7) throw fail("\"" + std::string(text) + "\" has " + std::to_string(v.size()) + " extents, not 7");
  const CoreShape s{v[0], v[1], v[2], v[3], v[4], v[5], v[6]};
  if (s.q_heads % s.kv_heads != 0)
    throw InputError(kCli, std::string(place),
                     "Hq = " + std::to_string(s.q_heads) + " is not a multiple of Hkv = " + std::to_string(s.kv_heads),
                     "choose Hkv dividing Hq (grouped-query attention)");
  return s;
}

}  // namespace headroom
