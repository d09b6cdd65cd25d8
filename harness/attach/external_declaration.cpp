// headroom — an external program's declaration as JSON, read strictly (external_program.h).
#include <algorithm>
#include <set>
#include <string>
#include <vector>

#include <nlohmann/json.hpp>

#include "headroom/external_program.h"
#include "headroom/input_error.h"
#include "headroom/json_input.h"
#include "headroom/kernel_abi.h"

namespace headroom {
namespace {

using nlohmann::json;

const std::set<std::string> kFields = {"protocol",  "name",       "description", "level",       "input_format",
                                       "output_format", "q_quant", "k_quant",     "v_quant",     "mask_kinds",
                                       "masked_row", "returns_lse", "max_kv_len", "layouts"};
// Protocol 2 (kernel_abi.h version 2): the shapes a kernel accepts, persistent mode, features, and
// its 8-bit float conversions (block sizes travel inside q_quant, k_quant, v_quant).
const std::set<std::string> kFieldsV2 = {"key_dims",  "value_dims", "head_dim_multiple", "kv_len_multiple",
                                         "max_q_len", "max_batch",  "serve",             "features",
                                         "fp8_saturating", "p_quant", "p_scale", "backward",
                                         "backward_flags"};
// The protocol-2 names of kernel_abi.h's HR_FEATURE_* bits this build judges.
const std::pair<const char*, std::uint32_t> kFeatureNames[] = {
    {"window", HR_FEATURE_WINDOW}, {"softcap", HR_FEATURE_SOFTCAP}, {"sinks", HR_FEATURE_SINKS},
    {"varlen", HR_FEATURE_VARLEN}};
// The protocol-2 names of kernel_abi.h's HR_BACKWARD_* bits.
const std::pair<const char*, std::uint32_t> kBackwardFlagNames[] = {{"recomputes", HR_BACKWARD_RECOMPUTES},
                                                                    {"nondeterministic", HR_BACKWARD_NONDETERMINISTIC},
                                                                    {"bias_grad", HR_BACKWARD_BIAS_GRAD}};

std::string place(const std::string& field) { return "describe output, field \"" + field + "\""; }

[[noreturn]] void refuse(const std::string& origin, const std::string& field, const std::string& problem,
                         const std::string& fix) {
  throw InputError(origin, place(field), problem, fix);
}

const json& required(const json& j, const char* field, const std::string& origin) {
  auto it = j.find(field);
  if (it == j.end()) refuse(origin, field, "missing", "add it (see docs/external-program.md)");
  return *it;
}

std::string string_field(const json& v, const char* field, const std::string& origin) {
  if (!v.is_string()) refuse(origin, field, "expected a string, found " + v.dump(), "give a JSON string");
  return v.get<std::string>();
}

Format format_field(const json& j, const char* field, const std::string& origin) {
  const std::string name = string_field(required(j, field, origin), field, origin);
  auto f = parse_format(name);
  if (!f) refuse(origin, field, "unknown format \"" + name + "\"", "use float64, float32, binary16, bfloat16, int8, e4m3 or e5m2");
  return *f;
}

QuantScheme quant_field(const json& j, const char* field, const std::string& origin) {
  const json& q = required(j, field, origin);
  if (!q.is_object()) refuse(origin, field, "expected an object, found " + q.dump(), "give {\"granularity\": ..., \"asymmetric\": ...}");
  for (auto it = q.begin(); it != q.end(); ++it) {
    if (it.key() != "granularity" && it.key() != "asymmetric" && it.key() != "block") {
      refuse(origin, field, "unknown key \"" + it.key() + "\"", "use only \"granularity\", \"asymmetric\" and \"block\"");
    }
  }
  QuantScheme s;
  const std::string g = string_field(required(q, "granularity", origin), field, origin);
  auto gran = parse_granularity(g);
  if (!gran) {
    refuse(origin, field, "unknown granularity \"" + g + "\"", "use per_tensor, per_head, per_token, per_channel or per_block");
  }
  s.granularity = *gran;
  if (auto b = q.find("block"); b != q.end()) {
    if (!b->is_number_integer() || b->get<std::int64_t>() < 1 || *gran != Granularity::per_block) {
      refuse(origin, field, "\"block\" must be a positive integer, given with per_block only; found " + b->dump(),
             "give the tokens per scale block, e.g. \"block\": 64, with \"granularity\": \"per_block\"");
    }
    s.block = b->get<std::int64_t>();
  } else if (*gran == Granularity::per_block) {
    refuse(origin, field, "per_block without \"block\"", "give the tokens per scale block, e.g. \"block\": 64");
  }
  if (auto a = q.find("asymmetric"); a != q.end()) {
    if (!a->is_boolean()) refuse(origin, field, "\"asymmetric\" must be true or false", "give a JSON boolean");
    s.asymmetric = a->get<bool>();
  }
  return s;
}

json scheme_json(const QuantScheme& s) {
  json j{{"granularity", std::string(granularity_name(s.granularity))}, {"asymmetric", s.asymmetric}};
  if (s.granularity == Granularity::per_block) j["block"] = s.block;
  return j;
}

std::int64_t count_field(const json& j, const char* field, const std::string& origin) {
  auto it = j.find(field);
  if (it == j.end()) return 0;
  if (!it->is_number_integer() || it->get<std::int64_t>() < 0) {
    refuse(origin, field, "expected an integer ≥ 0, found " + it->dump(), "give 0 for no constraint or a positive integer");
  }
  return it->get<std::int64_t>();
}

std::vector<std::int64_t> dims_field(const json& j, const char* field, const std::string& origin) {
  std::vector<std::int64_t> out;
  auto it = j.find(field);
  if (it == j.end()) return out;
  if (!it->is_array() || it->empty()) {
    refuse(origin, field, "expected a non-empty array of head dims, found " + it->dump(),
           "e.g. [64, 128, 256], or omit the field for any");
  }
  for (const json& v : *it) {
    if (!v.is_number_integer()) refuse(origin, field, "expected integers, found " + v.dump(), "list positive integers");
    out.push_back(v.get<std::int64_t>());
  }
  std::sort(out.begin(), out.end());
  return out;
}

constexpr MaskKind kMaskKinds[] = {MaskKind::none,        MaskKind::causal_top_left, MaskKind::causal_bottom_right,
                                   MaskKind::key_padding, MaskKind::dense,           MaskKind::bias};

}  // namespace

KernelDeclaration declaration_from_json(const std::string& text, const std::string& origin, int* serve) {
  // Errors say "describe output line L, column C".
  const json j = parse_json_input(text, origin + ": describe output", "print exactly one JSON object on stdout (logs go to stderr)");
  if (!j.is_object()) {
    throw InputError(origin, "describe output", "expected a JSON object", "print the declaration as one JSON object");
  }
  const json& protocol = required(j, "protocol", origin);
  if (!protocol.is_number_integer() || protocol.get<long long>() < kOldestExternalProtocolVersion ||
      protocol.get<long long>() > kExternalProtocolVersion) {
    refuse(origin, "protocol", "speaks protocol " + protocol.dump() + ", this headroom speaks " +
                                   std::to_string(kOldestExternalProtocolVersion) + " to " +
                                   std::to_string(kExternalProtocolVersion),
           "update the program to protocol " + std::to_string(kExternalProtocolVersion) + " (docs/external-program.md)");
  }
  const int version = static_cast<int>(protocol.get<long long>());
  for (auto it = j.begin(); it != j.end(); ++it) {
    if (kFieldsV2.count(it.key()) != 0 && version < 2) {
      refuse(origin, it.key(), "is a protocol 2 field but the program declares protocol 1",
             "declare \"protocol\": 2 (docs/external-program.md)");
    }
    if (kFields.count(it.key()) == 0 && kFieldsV2.count(it.key()) == 0) {
      refuse(origin, it.key(), "unknown field", "remove it or correct its spelling (see docs/external-program.md)");
    }
  }
  if (serve != nullptr) *serve = 0;
  if (auto it = j.find("serve"); it != j.end()) {
    // The persistent mode's own version (docs/external-program.md, "Persistent mode"); 0 = one-shot.
    if (!it->is_number_integer() || (it->get<long long>() != 0 && it->get<long long>() != kServeProtocolVersion))
      refuse(origin, "serve", "expected 0 (one-shot) or " + std::to_string(kServeProtocolVersion) +
                                  " (persistent mode, the version this headroom speaks), found " + it->dump(),
             "declare \"serve\": " + std::to_string(kServeProtocolVersion) + " or leave it out");
    if (serve != nullptr) *serve = static_cast<int>(it->get<long long>());
  }
  KernelDeclaration d;
  d.interface_version = version;
  d.name = string_field(required(j, "name", origin), "name", origin);
  if (auto it = j.find("description"); it != j.end()) d.description = string_field(*it, "description", origin);
  const std::string level = string_field(required(j, "level", origin), "level", origin);
  if (level == "core") {
    d.level = Level::core;
  } else if (level == "block") {
    d.level = Level::block;
  } else {
    refuse(origin, "level", "unknown level \"" + level + "\"", "use \"core\" or \"block\"");
  }
  d.input_format = format_field(j, "input_format", origin);
  d.output_format = format_field(j, "output_format", origin);
  if ((is_fp8(d.input_format) || is_fp8(d.output_format)) && version < 2) {
    refuse(origin, "input_format", "8-bit float formats are protocol 2", "declare \"protocol\": 2 (docs/external-program.md)");
  }
  if (is_quantised(d.input_format)) {
    d.q_quant = quant_field(j, "q_quant", origin);
    d.k_quant = quant_field(j, "k_quant", origin);
    d.v_quant = quant_field(j, "v_quant", origin);
  } else {
    for (const char* f : {"q_quant", "k_quant", "v_quant"}) {
      if (j.contains(f)) {
        refuse(origin, f, "given but the input format is not int8, e4m3 or e5m2", "remove it, or declare such an input");
      }
    }
  }
  const json& masks = required(j, "mask_kinds", origin);
  if (!masks.is_array()) refuse(origin, "mask_kinds", "expected an array of mask kind names", "e.g. [\"none\", \"causal_top_left\"]");
  d.mask_kinds = 0;
  for (const json& m : masks) {
    const std::string name = string_field(m, "mask_kinds", origin);
    auto kind = parse_mask_kind(name);
    if (!kind) {
      refuse(origin, "mask_kinds", "unknown mask kind \"" + name + "\"",
             "use none, causal_top_left, causal_bottom_right, key_padding, dense or bias");
    }
    d.mask_kinds |= mask_bit(*kind);
  }
  const std::string row = string_field(required(j, "masked_row", origin), "masked_row", origin);
  if (row == "zeros") {
    d.masked_row = MaskedRowConvention::zeros;
  } else if (row == "nan") {
    d.masked_row = MaskedRowConvention::nan;
  } else if (row == "never_called") {
    d.masked_row = MaskedRowConvention::never_called;
  } else {
    refuse(origin, "masked_row", "unknown convention \"" + row + "\"", "use \"zeros\", \"nan\" or \"never_called\"");
  }
  if (auto it = j.find("returns_lse"); it != j.end()) {
    if (!it->is_boolean()) refuse(origin, "returns_lse", "expected true or false, found " + it->dump(), "give a JSON boolean");
    d.returns_lse = it->get<bool>();
  }
  if (auto it = j.find("max_kv_len"); it != j.end()) {
    if (!it->is_number_integer()) refuse(origin, "max_kv_len", "expected an integer, found " + it->dump(), "give 0 or a positive integer");
    d.max_kv_len = it->get<std::int64_t>();
  }
  d.layouts = HR_LAYOUT_BHTD;
  if (auto it = j.find("layouts"); it != j.end()) {
    if (!it->is_array() || *it != json::array({"BHTD"})) {
      refuse(origin, "layouts", "external programs exchange C-order [B, H, T, D] .npy files; found " + it->dump(),
             "omit \"layouts\" or give [\"BHTD\"]");
    }
  }
  d.key_dims = dims_field(j, "key_dims", origin);
  d.value_dims = dims_field(j, "value_dims", origin);
  d.head_dim_multiple = std::max<std::int64_t>(1, count_field(j, "head_dim_multiple", origin));
  d.kv_len_multiple = std::max<std::int64_t>(1, count_field(j, "kv_len_multiple", origin));
  d.max_q_len = count_field(j, "max_q_len", origin);
  d.max_batch = count_field(j, "max_batch", origin);
  if (auto it = j.find("features"); it != j.end()) {
    if (!it->is_array()) refuse(origin, "features", "expected an array of feature names, found " + it->dump(), "e.g. [\"window\"]");
    for (const json& f : *it) {
      const std::string name = string_field(f, "features", origin);
      bool known = false;
      for (const auto& [n, bit] : kFeatureNames) {
        if (name == n) d.features |= bit, known = true;
      }
      if (!known && (name == "paged_kv" || name == "split_partials"))
        refuse(origin, "features", "feature \"" + name + "\" is judged for plug-ins only: the external-program exchange "
                                   "does not carry pages, block tables or split partials yet",
               "build the kernel as a shared library against kernel_abi.h, or leave \"" + name + "\" out");
      if (!known) refuse(origin, "features", "unknown or not yet judged feature \"" + name + "\"",
                          "use \"window\", \"softcap\" or \"sinks\"");
    }
  }
  if (auto it = j.find("fp8_saturating"); it != j.end()) {
    if (!it->is_boolean()) refuse(origin, "fp8_saturating", "expected true or false, found " + it->dump(), "give a JSON boolean");
    d.fp8_saturating = it->get<bool>();
  }
  if (auto it = j.find("p_quant"); it != j.end()) {
    const std::string name = string_field(*it, "p_quant", origin);
    if (name != "none") {
      auto f = parse_format(name);
      if (!f || !is_fp8(*f)) refuse(origin, "p_quant", "unknown P format \"" + name + "\"", "use \"none\", \"e4m3\" or \"e5m2\"");
      d.p_quant = *f;
    }
  }
  if (auto it = j.find("p_scale"); it != j.end()) {
    if (!it->is_number()) refuse(origin, "p_scale", "expected a number, found " + it->dump(), "give a positive number, or 0 for 1");
    const double v = it->get<double>();
    d.p_scale = v == 0.0 ? 1.0f : static_cast<float>(v);
    if (static_cast<double>(d.p_scale) != v && v != 0.0) {
      refuse(origin, "p_scale", it->dump() + " is not a float32 value", "give a value exactly representable in float32, e.g. 448");
    }
  }
  // The backward entry (kernel_abi.h run_backward, backward_flags): `CMD run-backward DIR`.
  if (auto it = j.find("backward"); it != j.end()) {
    if (!it->is_boolean()) refuse(origin, "backward", "expected true or false, found " + it->dump(), "give a JSON boolean");
    d.backward = it->get<bool>();
  }
  if (auto it = j.find("backward_flags"); it != j.end()) {
    if (!it->is_array())
      refuse(origin, "backward_flags", "expected an array of flag names, found " + it->dump(), "e.g. [\"recomputes\"]");
    for (const json& f : *it) {
      const std::string name = string_field(f, "backward_flags", origin);
      bool known = false;
      for (const auto& [n, bit] : kBackwardFlagNames) {
        if (name == n) d.backward_flags |= bit, known = true;
      }
      if (!known)
        refuse(origin, "backward_flags", "unknown flag \"" + name + "\"",
               "use \"recomputes\", \"nondeterministic\" or \"bias_grad\"");
    }
  }
  if (!d.backward && d.backward_flags != 0)
    refuse(origin, "backward_flags", "given but the program declares no backward",
           "declare \"backward\": true and answer `CMD run-backward DIR`, or remove \"backward_flags\"");
  if (d.backward && (d.level != Level::core || is_quantised(d.input_format)))
    refuse(origin, "backward", "a backward is judged for core kernels with float inputs only",
           "declare \"backward\": false (or leave it out) on a block or int8/e4m3/e5m2 kernel");
  check_declaration(d, origin);
  return d;
}

std::string declaration_to_json(const KernelDeclaration& d) {
  json masks = json::array();
  for (MaskKind k : kMaskKinds) {
    if (d.supports(k)) masks.push_back(std::string(mask_kind_name(k)));
  }
  json j = {
      {"protocol", kExternalProtocolVersion},
      {"name", d.name},
      {"description", d.description},
      {"level", d.level == Level::core ? "core" : "block"},
      {"input_format", std::string(format_name(d.input_format))},
      {"output_format", std::string(format_name(d.output_format))},
      {"mask_kinds", masks},
      {"masked_row", masked_row_name(d.masked_row)},
      {"returns_lse", d.returns_lse},
      {"max_kv_len", d.max_kv_len},
      {"layouts", json::array({"BHTD"})},
      {"head_dim_multiple", d.head_dim_multiple},
      {"kv_len_multiple", d.kv_len_multiple},
      {"max_q_len", d.max_q_len},
      {"max_batch", d.max_batch},
  };
  if (!d.key_dims.empty()) j["key_dims"] = d.key_dims;
  json features = json::array();
  for (const auto& [n, bit] : kFeatureNames) {
    if (d.features & bit) features.push_back(n);
  }
  if (!features.empty()) j["features"] = features;
  if (!d.value_dims.empty()) j["value_dims"] = d.value_dims;
  if (is_fp8(d.input_format) || d.p_quant) j["fp8_saturating"] = d.fp8_saturating;
  if (d.backward) {
    j["backward"] = true;
    json flags = json::array();
    for (const auto& [n, bit] : kBackwardFlagNames) {
      if (d.backward_flags & bit) flags.push_back(n);
    }
    j["backward_flags"] = flags;
  }
  if (d.p_quant) {
    j["p_quant"] = std::string(format_name(*d.p_quant));
    j["p_scale"] = d.p_scale;
  }
  if (is_quantised(d.input_format)) {
    j["q_quant"] = scheme_json(d.q_quant);
    j["k_quant"] = scheme_json(d.k_quant);
    j["v_quant"] = scheme_json(d.v_quant);
  }
  return j.dump(2);
}

}  // namespace headroom
