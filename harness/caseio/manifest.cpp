// headroom — internal: manifest.json of a case folder (see manifest.h, case_folder.h).
#include "manifest.h"

#include <algorithm>
#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <limits>
#include <nlohmann/json.hpp>
#include <set>
#include <utility>
#include <vector>

#include "headroom/case_folder.h"
#include "headroom/input_error.h"
#include "headroom/json_input.h"
#include "headroom/varlen.h"

namespace headroom::case_detail {
namespace {

using nlohmann::json;

constexpr const char* kSchemaFix = "see docs/case-format.md for the manifest's fields";

std::string float_text(double v, const char* fmt) {
  char buf[64];
  std::snprintf(buf, sizeof buf, fmt, v);
  return buf;
}

// Reads the fields of the parsed manifest, naming each in errors by its dotted path.
class Reader {
 public:
  explicit Reader(const std::string& file) : file_(file) {}

  [[noreturn]] void fail(const std::string& field, const std::string& problem, const std::string& fix = kSchemaFix) const {
    throw InputError(file_, "field \"" + field + "\"", problem, fix);
  }

  static std::string join(const std::string& path, const std::string& key) { return path.empty() ? key : path + "." + key; }

  // The object must have no keys beyond `known`.
  void only_keys(const json& obj, const std::vector<std::string>& known, const std::string& path) const {
    for (const auto& [key, value] : obj.items()) {
      if (std::find(known.begin(), known.end(), key) == known.end()) {
        std::string list;
        for (const auto& k : known) list += (list.empty() ? "" : ", ") + k;
        fail(join(path, key), "unknown key \"" + key + "\"" + (path.empty() ? "" : " in \"" + path + "\"") + " (known: " + list + ")",
             "remove it or correct its spelling");
      }
    }
  }

  const json& member(const json& obj, const std::string& key, const std::string& path) const {
    auto it = obj.find(key);
    if (it == obj.end()) fail(join(path, key), "missing field \"" + key + "\"", "add it; " + std::string(kSchemaFix));
    return *it;
  }

  const json& object_at(const json& obj, const std::string& key, const std::string& path) const {
    const json& v = member(obj, key, path);
    if (!v.is_object()) fail(join(path, key), type_problem("an object", v));
    return v;
  }

  std::string string_at(const json& obj, const std::string& key, const std::string& path) const {
    const json& v = member(obj, key, path);
    if (!v.is_string()) fail(join(path, key), type_problem("a string", v));
    return v.get<std::string>();
  }

  std::int64_t int_of(const json& v, const std::string& field) const {
    // 2.0 is a float in JSON: an extent written as one is almost surely computed, not meant.
    if (!v.is_number_integer()) fail(field, type_problem("an integer", v));
    if (v.is_number_unsigned() && v.get<std::uint64_t>() > static_cast<std::uint64_t>(std::numeric_limits<std::int64_t>::max()))
      fail(field, "integer " + v.dump() + " is too large", "use a value below 2^63");
    return v.get<std::int64_t>();
  }

  std::int64_t int_at(const json& obj, const std::string& key, const std::string& path) const {
    return int_of(member(obj, key, path), join(path, key));
  }

  std::uint64_t uint_at(const json& obj, const std::string& key, const std::string& path) const {
    const json& v = member(obj, key, path);
    if (!v.is_number_integer() || (!v.is_number_unsigned() && v.get<std::int64_t>() < 0))
      fail(join(path, key), type_problem("an integer in [0, 2^64)", v));
    return v.get<std::uint64_t>();
  }

  static std::string type_problem(const std::string& want, const json& found) {
    std::string shown = found.dump();
    if (shown.size() > 40) shown = shown.substr(0, 37) + "...";
    return "expected " + want + ", found " + std::string(found.type_name()) + " " + shown;
  }

 private:
  const std::string& file_;
};

json parse_json(std::string_view text, const std::string& file) {
  json j = parse_json_input(text, file, "correct the JSON syntax at that place");
  if (!j.is_object()) throw InputError(file, "line 1, column 1", "the manifest is not a JSON object", kSchemaFix);
  return j;
}

// A float32 written exactly as a hex float string ("0x1.9p+5"), as C's printf("%a") writes it.
float read_hex_float32(const json& v, const std::string& field, const Reader& r) {
  if (!v.is_string()) r.fail(field, Reader::type_problem("a hex float string such as \"0x1.9p+5\"", v));
  const std::string hex = v.get<std::string>();
  char* end = nullptr;
  const double h = std::strtod(hex.c_str(), &end);
  const bool is_hex = hex.find("0x") != std::string::npos || hex.find("0X") != std::string::npos;
  if (hex.empty() || end != hex.c_str() + hex.size() || !is_hex)
    r.fail(field, "\"" + hex + "\" is not a hex float", "write it as C's printf(\"%a\") does, e.g. \"0x1.9p+5\"");
  if (!std::isfinite(h)) r.fail(field, hex + " is not finite", "give a finite float32 value");
  const auto f = static_cast<float>(h);
  if (static_cast<double>(f) != h)
    r.fail(field, hex + " is not a float32 value (it has more than 24 significant bits or is out of range)",
           "round it to float32: " + float_text(f, "%a"));
  return f;
}

float read_scale(const json& root, const Reader& r) {
  const json& v = r.member(root, "scale", "");
  if (!v.is_number()) r.fail("scale", Reader::type_problem("a number", v));
  const double d = v.get<double>();
  const auto f = static_cast<float>(d);
  // Accepted: the float32's exact value, or the float32 printed with 9
  // significant digits (9 digits identify a float32 uniquely: IEEE 754-2019 §5.12.2).
  const bool exact = static_cast<double>(f) == d || std::strtod(float_text(f, "%.9g").c_str(), nullptr) == d;
  if (!exact || !std::isfinite(f))
    r.fail("scale", "scale " + float_text(d, "%.17g") + " is not a float32 value (nearest float32: " + float_text(f, "%.9g") + " = " +
                        float_text(f, "%a") + ")",
           "write the float32 value with 9 significant digits, or give \"scale_hex\"");
  auto it = root.find("scale_hex");
  if (it == root.end()) return f;
  const std::string hex = it->is_string() ? it->get<std::string>() : std::string();
  const float hf = read_hex_float32(*it, "scale_hex", r);
  if (hf != f)
    r.fail("scale", "scale " + float_text(d, "%.9g") + " and scale_hex " + hex + " (" + float_text(hf, "%.9g") +
                        ") are different float32 values",
           "make them agree; scale_hex is the exact one");
  return hf;
}

// The score features of a core case (kernel_abi.h version 2): "softcap_hex" and "sinks_hex".
void read_score_features(const json& root, const Reader& r, CoreProblem& p) {
  if (auto it = root.find("softcap_hex"); it != root.end()) {
    p.softcap = read_hex_float32(*it, "softcap_hex", r);
    if (!(p.softcap > 0.0f)) r.fail("softcap_hex", "the soft cap must be > 0", "give a cap such as \"0x1.9p+5\" (50), or remove the field");
  }
  if (auto it = root.find("sinks_hex"); it != root.end()) {
    if (!it->is_array() || it->empty()) r.fail("sinks_hex", Reader::type_problem("a non-empty array of hex floats, one per query head", *it));
    for (std::size_t h = 0; h < it->size(); ++h)
      p.sinks.push_back(read_hex_float32((*it)[h], "sinks_hex[" + std::to_string(h) + "]", r));
  }
}

// Delayed 8-bit float scales (problem.h, CoreProblem::fp8_delayed):
// "fp8_delayed_scales_hex": {"q": hex, "k": hex, "v": hex}, each optional, > 0.
void read_delayed_scales(const json& root, const Reader& r, CoreProblem& p) {
  auto it = root.find("fp8_delayed_scales_hex");
  if (it == root.end()) return;
  if (!it->is_object() || it->empty())
    r.fail("fp8_delayed_scales_hex", Reader::type_problem("an object {\"q\": hex, \"k\": hex, \"v\": hex} with at least one entry", *it));
  r.only_keys(*it, {"q", "k", "v"}, "fp8_delayed_scales_hex");
  const std::pair<const char*, float*> fields[] = {{"q", &p.fp8_delayed.q}, {"k", &p.fp8_delayed.k}, {"v", &p.fp8_delayed.v}};
  for (const auto& [key, out] : fields) {
    auto e = it->find(key);
    if (e == it->end()) continue;
    const std::string field = std::string("fp8_delayed_scales_hex.") + key;
    *out = read_hex_float32(*e, field, r);
    if (!(*out > 0.0f)) r.fail(field, "a delayed scale must be > 0", "give a scale such as \"0x1p+0\" (1), or remove the entry");
  }
}

// A packed variable-length batch (kernel_abi.h version 2, HR_FEATURE_VARLEN):
// "varlen": {"q_lens": [...], "kv_lens": [...]}, one entry per sequence.
void read_varlen(const json& root, const Reader& r, CoreProblem& p) {
  auto it = root.find("varlen");
  if (it == root.end()) return;
  if (!it->is_object()) r.fail("varlen", Reader::type_problem("an object {\"q_lens\": [...], \"kv_lens\": [...]}", *it));
  r.only_keys(*it, {"q_lens", "kv_lens"}, "varlen");
  std::vector<std::int64_t> lens[2];
  const char* keys[2] = {"q_lens", "kv_lens"};
  for (int a = 0; a < 2; ++a) {
    const json& v = r.member(*it, keys[a], "varlen");
    const std::string field = std::string("varlen.") + keys[a];
    if (!v.is_array() || v.empty()) r.fail(field, Reader::type_problem("a non-empty array of lengths, one per sequence", v));
    for (std::size_t n = 0; n < v.size(); ++n) {
      const std::int64_t l = r.int_of(v[n], field + "[" + std::to_string(n) + "]");
      if (l < 0 || l > (std::int64_t{1} << 40))
        r.fail(field + "[" + std::to_string(n) + "]", "length " + std::to_string(l) + " is out of range",
               "give a length in [0, 2^40]");
      lens[a].push_back(l);
    }
  }
  if (lens[0].size() != lens[1].size())
    r.fail("varlen.kv_lens", std::to_string(lens[1].size()) + " key lengths for " + std::to_string(lens[0].size()) + " sequences",
           "give one query length and one key length per sequence");
  const std::vector<std::int64_t> cu_q = offsets_of(lens[0]), cu_kv = offsets_of(lens[1]);
  if (cu_q.back() != p.shape.q_len || cu_kv.back() != p.shape.kv_len || p.shape.batch != 1)
    r.fail("varlen", "the lengths sum to " + std::to_string(cu_q.back()) + " queries and " + std::to_string(cu_kv.back()) +
                         " keys, the shape says batch " + std::to_string(p.shape.batch) + ", q_len " +
                         std::to_string(p.shape.q_len) + ", kv_len " + std::to_string(p.shape.kv_len),
           "a packed batch has shape batch 1, q_len the sum of q_lens, kv_len the sum of kv_lens (docs/varlen.md)");
  p.mask.cu_q_lens = cu_q;
  p.mask.cu_kv_lens = cu_kv;
}

// The paged layout of a core case: "paged": {"page_size", "num_pages",
// "seq_lens": [B], "block_table": [B][max_pages_per_seq]} (docs/case-format.md).
void read_paged(const json& root, const Reader& r, CoreProblem& p) {
  auto it = root.find("paged");
  if (it == root.end()) return;
  if (!it->is_object()) r.fail("paged", Reader::type_problem("an object", *it));
  const json& pj = *it;
  r.only_keys(pj, {"page_size", "num_pages", "seq_lens", "block_table"}, "paged");
  p.paged.page_size = r.int_at(pj, "page_size", "paged");
  p.paged.num_pages = r.int_at(pj, "num_pages", "paged");
  if (p.paged.page_size < 1) r.fail("paged.page_size", "the page size must be >= 1", "give the keys per page, e.g. 16");
  const json& lens = r.member(pj, "seq_lens", "paged");
  if (!lens.is_array() || lens.empty()) r.fail("paged.seq_lens", Reader::type_problem("a non-empty array of integers", lens));
  for (std::size_t b = 0; b < lens.size(); ++b)
    p.mask.kv_lens.push_back(r.int_of(lens[b], "paged.seq_lens[" + std::to_string(b) + "]"));
  const json& table = r.member(pj, "block_table", "paged");
  if (!table.is_array() || table.empty()) r.fail("paged.block_table", Reader::type_problem("an array of arrays of page indices", table));
  for (std::size_t b = 0; b < table.size(); ++b) {
    const std::string row = "paged.block_table[" + std::to_string(b) + "]";
    if (!table[b].is_array() || table[b].empty()) r.fail(row, Reader::type_problem("a non-empty array of page indices", table[b]));
    if (b == 0) p.paged.max_pages_per_seq = static_cast<std::int64_t>(table[b].size());
    if (static_cast<std::int64_t>(table[b].size()) != p.paged.max_pages_per_seq)
      r.fail(row, "has " + std::to_string(table[b].size()) + " slots, the first row " +
                      std::to_string(p.paged.max_pages_per_seq),
             "give every sequence max_pages_per_seq slots, -1 past its last page");
    for (std::size_t s = 0; s < table[b].size(); ++s) {
      const std::int64_t pg = r.int_of(table[b][s], row + "[" + std::to_string(s) + "]");
      if (pg < -1 || pg > std::numeric_limits<std::int32_t>::max())
        r.fail(row + "[" + std::to_string(s) + "]", "page " + std::to_string(pg) + " is not a page index or -1",
               "give a page in [0, num_pages) or -1 for an unused slot");
      p.paged.block_table.push_back(static_cast<std::int32_t>(pg));
    }
  }
}

}  // namespace

bool valid_case_name(std::string_view name) {
  if (name.empty() || name.size() > 200 || name == "." || name == "..") return false;
  return std::all_of(name.begin(), name.end(), [](char c) {
    return (c >= 'a' && c <= 'z') || (c >= 'A' && c <= 'Z') || (c >= '0' && c <= '9') || c == '_' || c == '.' || c == '+' || c == '-';
  });
}

Case parse_manifest(std::string_view text, const std::string& file) {
  const json root = parse_json(text, file);
  const Reader r(file);
  r.only_keys(root, {"headroom_case", "name", "level", "shape", "scale", "scale_hex", "softcap_hex", "sinks_hex",
                     "fp8_delayed_scales_hex", "varlen", "paged", "source_format", "mask", "provenance"},
              "");

  const std::int64_t version = r.int_at(root, "headroom_case", "");
  if (version != kCaseFormatVersion)
    r.fail("headroom_case", "case format version " + std::to_string(version) + " (this headroom reads version " +
                                std::to_string(kCaseFormatVersion) + ")",
           "convert the case with the headroom that wrote it, or upgrade");

  Case c;
  c.name = r.string_at(root, "name", "");
  if (!valid_case_name(c.name))
    r.fail("name", "\"" + c.name + "\" is not a valid case name", "use 1 to 200 characters from A-Z a-z 0-9 _ . + -");

  const std::string level = r.string_at(root, "level", "");
  if (level == "core") {
    c.level = Level::core;
  } else if (level == "block") {
    c.level = Level::block;
  } else {
    r.fail("level", "unknown level \"" + level + "\"", "use \"core\" or \"block\"");
  }

  const json& shape = r.object_at(root, "shape", "");
  std::vector<std::string> shape_keys{"batch", "q_heads", "kv_heads", "q_len", "kv_len", "key_dim", "value_dim"};
  if (c.level == Level::block) shape_keys.push_back("model_dim");
  r.only_keys(shape, shape_keys, "shape");
  auto extent = [&](const char* key) { return r.int_at(shape, key, "shape"); };
  CoreShape cs{extent("batch"), extent("q_heads"), extent("kv_heads"), extent("q_len"),
               extent("kv_len"), extent("key_dim"), extent("value_dim")};

  const float scale = read_scale(root, r);

  const std::string fmt = r.string_at(root, "source_format", "");
  const auto format = parse_format(fmt);
  if (!format || format_name(*format) != fmt || is_quantised(*format))
    r.fail("source_format", "unknown source format \"" + fmt + "\"", "use \"float32\", \"float64\", \"binary16\" or \"bfloat16\"");
  c.source_format = *format;

  const json& mask_j = r.object_at(root, "mask", "");
  r.only_keys(mask_j, {"kind", "key_lengths", "window"}, "mask");
  Mask mask;
  const std::string kind = r.string_at(mask_j, "kind", "mask");
  const auto mk = parse_mask_kind(kind);
  if (!mk)
    r.fail("mask.kind", "unknown mask kind \"" + kind + "\"",
           "use none, causal_top_left, causal_bottom_right, key_padding, dense or bias");
  mask.kind = *mk;
  if (mask.kind == MaskKind::key_padding) {
    const json& lengths = r.member(mask_j, "key_lengths", "mask");
    if (!lengths.is_array()) r.fail("mask.key_lengths", Reader::type_problem("an array of integers", lengths));
    for (std::size_t b = 0; b < lengths.size(); ++b)
      mask.key_lengths.push_back(r.int_of(lengths[b], "mask.key_lengths[" + std::to_string(b) + "]"));
  } else if (mask_j.contains("key_lengths")) {
    r.fail("mask.key_lengths", "key_lengths given for mask kind " + kind, "remove it, or set mask.kind to key_padding");
  }
  if (mask_j.contains("window")) {
    const json& window = r.object_at(mask_j, "window", "mask");
    r.only_keys(window, {"left", "right"}, "mask.window");
    mask.window_left = r.int_at(window, "left", "mask.window");
    mask.window_right = r.int_at(window, "right", "mask.window");
    if (mask.window_left < -1 || mask.window_right < -1 || !mask.has_window())
      r.fail("mask.window", "sides must be -1 (open) or key counts >= 0, at least one of them >= 0",
             "give e.g. {\"left\": 127, \"right\": 0}, or remove \"window\"");
  }

  const json& prov = r.object_at(root, "provenance", "");
  r.only_keys(prov, {"family", "seed", "command"}, "provenance");
  c.provenance.family = r.string_at(prov, "family", "provenance");
  c.provenance.seed = r.uint_at(prov, "seed", "provenance");
  c.provenance.command = r.string_at(prov, "command", "provenance");

  if (c.level == Level::core) {
    c.core.shape = cs;
    c.core.scale = scale;
    c.core.mask = std::move(mask);
    read_score_features(root, r, c.core);
    read_delayed_scales(root, r, c.core);
    read_varlen(root, r, c.core);
    read_paged(root, r, c.core);
  } else {
    for (const char* key : {"softcap_hex", "sinks_hex", "fp8_delayed_scales_hex", "varlen", "paged"})
      if (root.contains(key)) r.fail(key, std::string(key) + " given for a block case", "remove it: only core cases soft-cap, sink, pack variable lengths or page K/V");
    c.block.shape = BlockShape{cs.batch, cs.q_len, cs.kv_len, extent("model_dim"), cs.q_heads, cs.kv_heads, cs.key_dim, cs.value_dim};
    c.block.scale = scale;
    c.block.mask = std::move(mask);
  }
  return c;
}

std::string format_manifest(const Case& c) {
  using ordered = nlohmann::ordered_json;
  const bool core = c.level == Level::core;
  const CoreShape s = core ? c.core.shape : c.block.shape.core();
  const float scale = core ? c.core.scale : c.block.scale;
  const Mask& mask = core ? c.core.mask : c.block.mask;

  ordered j;
  j["headroom_case"] = kCaseFormatVersion;
  j["name"] = c.name;
  j["level"] = core ? "core" : "block";
  ordered shape;
  shape["batch"] = s.batch;
  shape["q_heads"] = s.q_heads;
  shape["kv_heads"] = s.kv_heads;
  shape["q_len"] = s.q_len;
  shape["kv_len"] = s.kv_len;
  shape["key_dim"] = s.key_dim;
  shape["value_dim"] = s.value_dim;
  if (!core) shape["model_dim"] = c.block.shape.model_dim;
  j["shape"] = shape;
  // The JSON number is the double nearest the 9-digit decimal, which the
  // reader maps back to this float32; the hex float carries it exactly.
  j["scale"] = std::strtod(float_text(scale, "%.9g").c_str(), nullptr);
  j["scale_hex"] = float_text(scale, "%a");
  if (core && c.core.has_softcap()) j["softcap_hex"] = float_text(c.core.softcap, "%a");
  if (core && c.core.has_sinks()) {
    ordered sinks = ordered::array();
    for (float x : c.core.sinks) sinks.push_back(float_text(x, "%a"));
    j["sinks_hex"] = sinks;
  }
  if (core && c.core.fp8_delayed.any()) {
    ordered delayed;
    const std::pair<const char*, float> fields[] = {{"q", c.core.fp8_delayed.q}, {"k", c.core.fp8_delayed.k}, {"v", c.core.fp8_delayed.v}};
    for (const auto& [key, value] : fields)
      if (value != 0.0f) delayed[key] = float_text(value, "%a");
    j["fp8_delayed_scales_hex"] = delayed;
  }
  if (core && mask.is_varlen())
    j["varlen"] = ordered{{"q_lens", lengths_of(mask.cu_q_lens)}, {"kv_lens", lengths_of(mask.cu_kv_lens)}};
  if (core && c.core.has_paged_kv()) {
    const PagedKv& p = c.core.paged;
    ordered table = ordered::array();
    for (std::int64_t b = 0; b < s.batch; ++b) {
      ordered row = ordered::array();
      for (std::int64_t slot = 0; slot < p.max_pages_per_seq; ++slot) row.push_back(p.page(b, slot));
      table.push_back(row);
    }
    j["paged"] = ordered{{"page_size", p.page_size}, {"num_pages", p.num_pages}, {"seq_lens", mask.kv_lens},
                         {"block_table", table}};
  }
  j["source_format"] = std::string(format_name(c.source_format));
  ordered m;
  m["kind"] = std::string(mask_kind_name(mask.kind));
  if (mask.kind == MaskKind::key_padding) m["key_lengths"] = mask.key_lengths;
  if (mask.has_window()) m["window"] = ordered{{"left", mask.window_left}, {"right", mask.window_right}};
  j["mask"] = m;
  ordered prov;
  prov["family"] = c.provenance.family;
  prov["seed"] = c.provenance.seed;
  prov["command"] = c.provenance.command;
  j["provenance"] = prov;
  return j.dump(2) + "\n";
}

}  // namespace headroom::case_detail
