// headroom — the run record and its JSON form (record.h, docs/result-schema.md).
#include "headroom/record.h"

#include <algorithm>
#include <charconv>
#include <cmath>
#include <cstdio>
#include <limits>
#include <optional>

#include "headroom/atomic_file.h"
#include "headroom/error_growth.h"
#include "headroom/families.h"
#include "headroom/input_error.h"
#include "headroom/input_file.h"
#include "headroom/case_folder.h"
#include "headroom/faults.h"
#include "headroom/json_input.h"
#include "headroom/kernel.h"
#include "headroom/qualify.h"

namespace headroom {
namespace {

using nlohmann::json;

json number(double x) { return json_number(x); }

std::string fmt_number(double x) {
  if (std::isnan(x)) return "nan";
  if (std::isinf(x)) return x > 0 ? "inf" : "-inf";
  char buf[40];
  std::snprintf(buf, sizeof buf, "%.17g", x);
  return buf;
}

std::string range_text(double lo, double hi, bool nan_ok) {
  return "expected " + fmt_number(lo) + " to " + fmt_number(hi) + (nan_ok ? ", or \"nan\"" : "");
}

// A case name of a record: a case folder's name (valid_case_name), or, where
// replay met the same case in a second folder (cmd_replay.cpp), that name
// followed by "@" and the folder's path: printable, no control bytes, at most
// PATH_MAX (4096) bytes. Such names are shown quoted and never used as a path.
bool valid_record_case_name(const std::string& name) {
  const std::size_t at = name.find('@');
  if (at == std::string::npos) return valid_case_name(name);
  if (!valid_case_name(name.substr(0, at))) return false;
  const std::string_view folder = std::string_view(name).substr(at + 1);
  if (folder.empty() || folder.size() > 4096) return false;
  return std::none_of(folder.begin(), folder.end(), [](char ch) {
    const auto u = static_cast<unsigned char>(ch);
    return u < 0x20 || u == 0x7f;
  });
}

class Reader {
 public:
  Reader(const json& j, std::string file, std::string place) : j_(j), file_(std::move(file)), place_(std::move(place)) {
    if (!j_.is_object()) fail("", "is not a JSON object", "give a record written by headroom");
  }
  [[noreturn]] void fail(const std::string& key, const std::string& problem, const std::string& fix) const {
    throw InputError(file_, place_ + (key.empty() ? "" : " field \"" + key + "\""), problem, fix);
  }
  const json& field(const std::string& key) const {
    auto it = j_.find(key);
    if (it == j_.end()) fail(key, "is missing", "give a record written by headroom (schema " + std::to_string(kRecordSchema) + ")");
    return *it;
  }
  std::string str(const std::string& key) const {
    const json& v = field(key);
    if (!v.is_string()) fail(key, "is not a string", "write it as a JSON string");
    return v.get<std::string>();
  }
  double num(const std::string& key) const {
    const json& v = field(key);
    if (v.is_number()) return v.get<double>();
    if (v.is_string()) {
      const auto s = v.get<std::string>();
      if (s == "nan") return std::numeric_limits<double>::quiet_NaN();
      if (s == "inf") return std::numeric_limits<double>::infinity();
      if (s == "-inf") return -std::numeric_limits<double>::infinity();
    }
    fail(key, "is not a number", "write a JSON number, or \"nan\", \"inf\", \"-inf\"");
  }
  template <class Int>
  Int integer(const std::string& key) const {
    const json& v = field(key);
    if (!v.is_number_integer()) fail(key, "is not an integer", "write a JSON integer");
    if (v.is_number_unsigned()) return static_cast<Int>(v.get<std::uint64_t>());
    const auto x = v.get<std::int64_t>();
    if (x < 0 && !std::numeric_limits<Int>::is_signed) fail(key, "is negative", "write a non-negative integer");
    return static_cast<Int>(x);
  }
  bool boolean(const std::string& key) const {
    const json& v = field(key);
    if (!v.is_boolean()) fail(key, "is not true or false", "write true or false");
    return v.get<bool>();
  }
  std::vector<std::string> strings(const std::string& key) const {
    const json& v = field(key);
    if (!v.is_array()) fail(key, "is not an array", "write a JSON array of strings");
    std::vector<std::string> out;
    for (const auto& e : v) {
      if (!e.is_string()) fail(key, "holds a non-string", "write a JSON array of strings");
      out.push_back(e.get<std::string>());
    }
    return out;
  }
  std::vector<double> numbers(const std::string& key) const {
    const json& v = field(key);
    if (!v.is_array()) fail(key, "is not an array", "write a JSON array of numbers");
    std::vector<double> out;
    for (const auto& e : v) {
      if (!e.is_number()) fail(key, "holds a non-number", "write a JSON array of numbers");
      out.push_back(e.get<double>());
    }
    return out;
  }
  /// A number that must lie in [lo, hi]; NaN passes only when `nan_ok`.
  double num_in(const std::string& key, double lo, double hi, bool nan_ok) const {
    const double x = num(key);
    if (std::isnan(x) ? !nan_ok : (x < lo || x > hi))
      fail(key, fmt_number(x) + " is out of range: " + range_text(lo, hi, nan_ok), "give a record written by headroom");
    return x;
  }
  /// An error figure or a limit: ≥ 0, possibly +inf, NaN where not applicable.
  double size_like(const std::string& key) const {
    return num_in(key, 0, std::numeric_limits<double>::infinity(), true);
  }
  template <class Int>
  Int integer_in(const std::string& key, Int lo, Int hi) const {
    const json& v = field(key);
    if (!v.is_number_integer()) fail(key, "is not an integer", "write a JSON integer");
    const bool below = v.is_number_unsigned() ? false : v.get<std::int64_t>() < static_cast<std::int64_t>(lo);
    const bool above = v.is_number_unsigned() ? v.get<std::uint64_t>() > static_cast<std::uint64_t>(hi)
                                              : v.get<std::int64_t>() > static_cast<std::int64_t>(hi);
    if (below || above)
      fail(key, v.dump() + " is out of range [" + std::to_string(lo) + ", " + std::to_string(hi) + "]",
           "give a record written by headroom");
    return v.is_number_unsigned() ? static_cast<Int>(v.get<std::uint64_t>()) : static_cast<Int>(v.get<std::int64_t>());
  }
  /// A string that must be one of `allowed`.
  std::string one_of(const std::string& key, std::initializer_list<std::string_view> allowed) const {
    std::string v = str(key);
    std::string list;
    for (auto a : allowed) {
      if (v == a) return v;
      list += (list.empty() ? "" : ", ") + std::string(a);
    }
    fail(key, quote_input(v) + " is not one of " + list, "give a record written by headroom");
  }
  /// A case name: the rules of case folders (valid_case_name, case_folder.h),
  /// or, as `replay` names a second folder holding the same case, such a name,
  /// "@" and that folder's path (record_case_name).
  std::string case_name(const std::string& key) const {
    std::string v = str(key);
    if (!valid_record_case_name(v))
      fail(key, quote_input(v) + " is not a valid case name (1 to 200 of A-Z a-z 0-9 _ . + -, not . or ..; replay may " +
                    "add @ and a folder path)",
           "give a record written by headroom");
    return v;
  }
  bool has(const std::string& key) const { return j_.contains(key); }
  const json& raw() const { return j_; }
  const std::string& file() const { return file_; }
  const std::string& place() const { return place_; }

 private:
  const json& j_;
  std::string file_, place_;
};

json figures_json(const CaseFigures& f) {
  return {{"elements", f.elements},
          {"max_ulp", number(f.max_ulp)},
          {"max_scaled_error", number(f.max_scaled_error)},
          {"max_abs_error", number(f.max_abs_error)},
          {"rmse", number(f.rmse)},
          {"relative_rmse", number(f.relative_rmse)},
          {"relative_l1", number(f.relative_l1)},
          {"cosine", number(f.cosine)},
          {"lse_error", number(f.lse_error)},
          {"ratio_to_plain", number(f.ratio_to_plain)},
          {"input_error", number(f.input_error)},
          {"p_rounding_error", number(f.p_rounding_error)},
          {"kernel_error", number(f.kernel_error)},
          {"worst_index", f.worst_index},
          {"worst_expected", number(f.worst_expected)},
          {"worst_obtained", number(f.worst_obtained)},
          {"worst_ulp_at", number(f.worst_ulp_at)}};
}

CaseFigures figures_from(const Reader& r) {
  constexpr double kInf = std::numeric_limits<double>::infinity();
  CaseFigures f;
  f.elements = r.integer_in<std::int64_t>("elements", 0, std::numeric_limits<std::int64_t>::max());
  f.max_ulp = r.size_like("max_ulp");
  f.max_scaled_error = r.size_like("max_scaled_error");
  f.max_abs_error = r.size_like("max_abs_error");
  f.rmse = r.size_like("rmse");
  f.relative_rmse = r.size_like("relative_rmse");
  f.relative_l1 = r.size_like("relative_l1");
  // A cosine is in [−1, 1]; the computed one may pass 1 by a rounding or two.
  f.cosine = r.num_in("cosine", -1 - 1e-9, 1 + 1e-9, true);
  f.lse_error = r.size_like("lse_error");
  f.ratio_to_plain = r.size_like("ratio_to_plain");
  f.input_error = r.size_like("input_error");
  // Absent from records written before P rounding was measured (NaN: P not rounded).
  if (r.has("p_rounding_error")) f.p_rounding_error = r.size_like("p_rounding_error");
  f.kernel_error = r.size_like("kernel_error");
  f.worst_index = r.str("worst_index");
  f.worst_expected = r.num_in("worst_expected", -kInf, kInf, true);
  f.worst_obtained = r.num_in("worst_obtained", -kInf, kInf, true);
  // Added after schema 1 was first written: records without it still read (as NaN).
  if (r.has("worst_ulp_at")) f.worst_ulp_at = r.num_in("worst_ulp_at", -kInf, kInf, true);
  return f;
}

json limits_json(const CaseLimits& l) {
  json j = {{"max_ulp", number(l.max_ulp)},
            {"max_scaled_error", number(l.max_scaled_error)},
            {"max_rel_rmse", number(l.max_rel_rmse)},
            {"max_ratio_to_plain", number(l.max_ratio_to_plain)}};
  if (!std::isnan(l.max_gradient_scaled_error)) j["max_gradient_scaled_error"] = number(l.max_gradient_scaled_error);
  if (!std::isnan(l.max_gradient_scaled_error_end_to_end))
    j["max_gradient_scaled_error_end_to_end"] = number(l.max_gradient_scaled_error_end_to_end);
  if (!std::isnan(l.max_gradient_ratio_to_plain))
    j["max_gradient_ratio_to_plain"] = number(l.max_gradient_ratio_to_plain);
  return j;
}

CaseLimits limits_from(const Reader& r) {
  CaseLimits l;
  l.max_ulp = r.size_like("max_ulp");
  l.max_scaled_error = r.size_like("max_scaled_error");
  l.max_rel_rmse = r.size_like("max_rel_rmse");
  l.max_ratio_to_plain = r.size_like("max_ratio_to_plain");
  if (r.has("max_gradient_scaled_error")) l.max_gradient_scaled_error = r.size_like("max_gradient_scaled_error");
  if (r.has("max_gradient_scaled_error_end_to_end"))
    l.max_gradient_scaled_error_end_to_end = r.size_like("max_gradient_scaled_error_end_to_end");
  if (r.has("max_gradient_ratio_to_plain"))
    l.max_gradient_ratio_to_plain = r.size_like("max_gradient_ratio_to_plain");
  return l;
}

json gradients_json(const std::array<GradientFigures, 4>& g, std::size_t tensors) {
  json j = json::object();
  for (std::size_t t = 0; t < tensors; ++t)
    j[kGradientNames[t]] = {{"max_ulp", number(g[t].max_ulp)},
                            {"max_scaled_error", number(g[t].max_scaled_error)},
                            {"rmse", number(g[t].rmse)},
                            {"relative_rmse", number(g[t].relative_rmse)},
                            {"cosine", number(g[t].cosine)},
                            {"ratio_to_plain", number(g[t].ratio_to_plain)}};
  return j;
}

std::array<GradientFigures, 4> gradients_from(const Reader& r, std::size_t tensors) {
  std::array<GradientFigures, 4> g{};
  for (std::size_t t = 0; t < tensors; ++t) {
    const Reader e(r.field(kGradientNames[t]), r.file(), r.place() + " " + kGradientNames[t]);
    g[t].max_ulp = e.size_like("max_ulp");
    g[t].max_scaled_error = e.size_like("max_scaled_error");
    g[t].rmse = e.size_like("rmse");
    g[t].relative_rmse = e.size_like("relative_rmse");
    g[t].cosine = e.num_in("cosine", -1 - 1e-9, 1 + 1e-9, true);
    g[t].ratio_to_plain = e.size_like("ratio_to_plain");
  }
  return g;
}

json backward_json(const BackwardFigures& b) {
  return {{"fed_exact", gradients_json(b.fed_exact, b.tensors())},
          {"end_to_end", b.end_to_end_judged ? gradients_json(b.end_to_end, b.tensors()) : json(nullptr)},
          {"upstream", b.upstream},
          {"spread", number(b.spread)}};
}

BackwardFigures backward_from(const Reader& r) {
  BackwardFigures b;
  const Reader fed(r.field("fed_exact"), r.file(), r.place() + " fed_exact");
  b.bias_judged = fed.has(kGradientNames[3]);  // d_bias: written only where judged
  b.fed_exact = gradients_from(fed, b.tensors());
  b.end_to_end_judged = !r.field("end_to_end").is_null();
  if (b.end_to_end_judged)
    b.end_to_end = gradients_from(Reader(r.field("end_to_end"), r.file(), r.place() + " end_to_end"), b.tensors());
  b.upstream = r.str("upstream");
  b.spread = r.size_like("spread");
  return b;
}


// The "levels" field: level_takes() as JSON.
json levels_json(const RunRecord& r) {
  json levels = json::array();
  for (const LevelTake& t : r.level_takes())
    levels.push_back({{"level", t.level}, {"taken", t.taken}, {"of", t.of}, {"thin", t.thin()}});
  return levels;
}

}  // namespace

nlohmann::json json_number(double x) {
  if (std::isnan(x)) return "nan";
  if (std::isinf(x)) return x > 0 ? "inf" : "-inf";
  return x;
}

double BackwardFigures::worst_scaled_error() const {
  double worst = 0;
  for (const auto* way : {&fed_exact, &end_to_end}) {
    if (way == &end_to_end && !end_to_end_judged) continue;
    for (std::size_t t = 0; t < tensors(); ++t) {
      const GradientFigures& g = (*way)[t];
      if (std::isnan(g.max_scaled_error) || g.max_scaled_error > worst) worst = g.max_scaled_error;
    }
  }
  return worst;
}

double BackwardFigures::worst_ratio_to_plain() const {
  double worst = std::numeric_limits<double>::quiet_NaN();
  for (const auto* way : {&fed_exact, &end_to_end}) {
    if (way == &end_to_end && !end_to_end_judged) continue;
    for (std::size_t t = 0; t < tensors(); ++t) {
      const GradientFigures& g = (*way)[t];
      if (!std::isnan(g.ratio_to_plain) && !(g.ratio_to_plain <= worst)) worst = g.ratio_to_plain;
    }
  }
  return worst;
}

std::string RunRecord::verdict() const {
  std::string v = "pass";
  for (const auto& c : cases)
    if (!c.within_budget) v = "fail";
  if (!growth_failures().empty()) v = "fail";
  return missing_shards.empty() ? v : "partial_" + v;
}

std::vector<std::string> RunRecord::growth_failures() const {
  if (std::isnan(growth_limit)) return {};
  return headroom::growth_failures(error_growth(cases), growth_limit, growth_limit_origin);
}

std::vector<LevelTake> RunRecord::level_takes() const {
  std::vector<LevelTake> takes{{"core"}, {"block"}};
  std::vector<bool> ran(takes.size(), false);
  auto at = [&](const std::string& level) -> std::ptrdiff_t {
    for (std::size_t i = 0; i < takes.size(); ++i)
      if (takes[i].level == level) return static_cast<std::ptrdiff_t>(i);
    return -1;
  };
  for (const CaseRecord& c : cases) {
    const std::ptrdiff_t i = at(c.level);
    if (i < 0) continue;
    ran[static_cast<std::size_t>(i)] = true;
    ++takes[static_cast<std::size_t>(i)].of;
    if (c.faults.count("unsupported") == 0) ++takes[static_cast<std::size_t>(i)].taken;
  }
  for (const std::string& line : skipped) {
    // Case names begin with their family (generate.h); the longest family that prefixes the name wins.
    std::size_t best = 0;
    std::ptrdiff_t level = -1;
    for (const FamilyInfo& f : kFamilies) {
      const std::string_view n = f.name;
      if (n.size() > best && line.compare(0, n.size(), n) == 0 && line.size() > n.size() &&
          (line[n.size()] == '-' || line[n.size()] == ':')) {
        best = n.size();
        level = at(f.level == Level::core ? "core" : "block");
      }
    }
    if (level < 0) continue;
    ++takes[static_cast<std::size_t>(level)].of;
    // A case the kernel declined (judge.cpp lists it as skipped) was run: its level is this kernel's.
    if (line.find(": declined by the kernel") != std::string::npos) ran[static_cast<std::size_t>(level)] = true;
  }
  std::vector<LevelTake> out;
  for (std::size_t i = 0; i < takes.size(); ++i)
    if (ran[i]) out.push_back(takes[i]);
  return out;
}

std::string RunRecord::verdict_line() const {
  std::string line = verdict(), sep = " on ";
  for (const LevelTake& t : level_takes()) {
    if (!t.thin()) continue;
    line += sep + std::to_string(t.taken) + " of " + std::to_string(t.of) + " " + t.level + " cases";
    sep = " and ";
  }
  return line;
}

std::map<std::string, int> RunRecord::fault_totals() const {
  std::map<std::string, int> totals;
  for (const auto& c : cases)
    for (const auto& [name, n] : c.faults) totals[name] += n;
  return totals;
}

json to_json(const CaseRecord& c) {
  json j = {{"name", c.name},
          {"family", c.family},
          {"seed", c.seed},
          {"size", c.size},
          {"level", c.level},
          {"shape", c.shape},
          {"kv_len", c.kv_len},
          {"logit_scale", number(c.logit_scale)},
          {"mask", c.mask},
          {"format", c.format},
          {"figures", figures_json(c.figures)},
          {"faults", c.faults},
          {"fault_details", c.fault_details},
          {"within_budget", c.within_budget},
          {"reasons", c.reasons},
          {"replay", c.replay},
          {"ulp_histogram", c.ulp_histogram},
          {"limits", limits_json(c.limits)},
          {"reference_certified", c.reference_certified}};
  if (c.backward) j["backward"] = backward_json(*c.backward);
  return j;
}

namespace {

// The fits are derived from the cases (error_growth.h): written for readers, never read back.
json growth_json(const std::vector<FormatGrowth>& g) {
  json out = json::array();
  auto line = [](const GrowthLine& l) {
    return json{{"exponent", json_number(l.exponent)}, {"intercept", json_number(l.intercept)},
                {"spread", json_number(l.spread)}};
  };
  for (const FormatGrowth& f : g) {
    json families = json::array();
    for (const FamilyGrowth& x : f.families)
      families.push_back({{"family", x.family}, {"cases", x.cases}, {"lengths", x.lengths},
                          {"min_kv_len", x.min_kv_len}, {"max_kv_len", x.max_kv_len},
                          {"median", line(x.median)}, {"worst", line(x.worst)}});
    out.push_back({{"format", f.format}, {"exponent", json_number(f.exponent)}, {"low", json_number(f.low)},
                   {"high", json_number(f.high)}, {"worst_exponent", json_number(f.worst_exponent)},
                   {"families", families}});
  }
  return out;
}

}  // namespace

json to_json(const RunRecord& r) {
  json cases = json::array();
  for (const auto& c : r.cases) cases.push_back(to_json(c));
  json j = {{"schema", r.schema},
          {"tool", r.tool},
          {"command", r.command},
          {"kernel", r.kernel},
          {"kernel_description", r.kernel_description},
          {"input_format", r.input_format},
          {"output_format", r.output_format},
          {"suite", r.suite},
          {"budget", r.budget},
          {"shard", r.shard},
          {"verdict", r.verdict()},
          {"verdict_line", r.verdict_line()},
          {"levels", levels_json(r)},
          {"faults", r.fault_totals()},
          {"tolerated_faults", r.tolerated_faults},
          {"cases", cases},
          {"skipped", r.skipped},
          {"warnings", r.warnings},
          {"growth_limit", json_number(r.growth_limit)},
          {"growth_limit_origin", r.growth_limit_origin},
          {"error_growth", growth_json(error_growth(r.cases))}};
  if (!r.missing_shards.empty()) j["missing_shards"] = r.missing_shards;
  return j;
}

namespace {

// The extents of a shape field: 7 (core) or 8 (block) positive integers, comma-separated.
std::vector<std::int64_t> shape_extents(const Reader& r, const std::string& shape, const std::string& level) {
  const std::size_t want = level == "core" ? 7 : 8;
  std::vector<std::int64_t> out;
  for (std::size_t start = 0; start <= shape.size();) {
    const std::size_t comma = std::min(shape.find(',', start), shape.size());
    std::int64_t e = 0;
    const char* b = shape.data() + start;
    const char* end = shape.data() + comma;
    const auto res = std::from_chars(b, end, e);
    if (res.ec != std::errc{} || res.ptr != end || e < 1) break;
    out.push_back(e);
    start = comma + 1;
  }
  if (out.size() != want || std::count(shape.begin(), shape.end(), ',') + 1 != static_cast<std::ptrdiff_t>(want))
    r.fail("shape", quote_input(shape) + " is not " + std::to_string(want) + " positive integers for level " + level,
           level == "core" ? "write B,Hq,Hkv,Tq,Tk,Dk,Dv" : "write B,Tq,Tk,Dm,Hq,Hkv,Dk,Dv");
  return out;
}

// A fault-class → count object; every class a known one (faults.h).
std::map<std::string, int> fault_counts(const Reader& r, const std::string& key) {
  const json& faults = r.field(key);
  if (!faults.is_object()) r.fail(key, "is not an object", "write {\"class\": count, ...}");
  std::map<std::string, int> out;
  for (const auto& [name, n] : faults.items()) {
    if (!parse_fault_class(name))
      r.fail(key, quote_input(name) + " is not a fault class", "give a record written by headroom (classes: DESIGN.md)");
    if (!n.is_number_integer() || (n.is_number_integer() && !n.is_number_unsigned() && n.get<std::int64_t>() < 0) ||
        (n.is_number_unsigned() && n.get<std::uint64_t>() > static_cast<std::uint64_t>(std::numeric_limits<int>::max())))
      r.fail(key, "count of " + quote_input(name) + " is not an integer from 0 to 2^31 - 1", "write a count");
    out[name] = n.get<int>();
  }
  return out;
}

std::vector<std::string> fault_classes(const Reader& r, const std::string& key) {
  std::vector<std::string> out = r.strings(key);
  for (const auto& name : out)
    if (!parse_fault_class(name)) r.fail(key, quote_input(name) + " is not a fault class", "give a record written by headroom");
  return out;
}

// "i/n" with 1 ≤ i ≤ n ≤ 100000 (the range --shard takes), or nothing.
std::optional<Shard> shard_of(const std::string& text) {
  const auto slash = text.find('/');
  if (slash == std::string::npos) return std::nullopt;
  int i = 0, n = 0;
  const char* b = text.data();
  const char* e = b + text.size();
  const auto r1 = std::from_chars(b, b + slash, i);
  const auto r2 = std::from_chars(b + slash + 1, e, n);
  if (r1.ec != std::errc{} || r1.ptr != b + slash || r2.ec != std::errc{} || r2.ptr != e) return std::nullopt;
  if (n < 1 || n > 100000 || i < 1 || i > n) return std::nullopt;
  return Shard{i - 1, n};
}

}  // namespace

CaseRecord case_record_from_json(const json& j, const std::string& file, const std::string& place) {
  const Reader r(j, file, place);
  CaseRecord c;
  c.name = r.case_name("name");
  c.family = r.str("family");
  c.seed = r.integer<std::uint64_t>("seed");
  c.size = r.integer_in<int>("size", 0, std::numeric_limits<int>::max());
  c.level = r.one_of("level", {"core", "block"});
  c.shape = r.str("shape");
  const std::vector<std::int64_t> extents = shape_extents(r, c.shape, c.level);
  (void)extents;
  c.kv_len = r.integer_in<std::int64_t>("kv_len", 0, std::numeric_limits<std::int64_t>::max());
  c.logit_scale = r.size_like("logit_scale");
  c.mask = r.str("mask");
  if (!parse_mask_kind(c.mask)) r.fail("mask", quote_input(c.mask) + " is not a mask kind", "give a record written by headroom");
  c.format = r.str("format");
  if (!parse_format(c.format)) r.fail("format", quote_input(c.format) + " is not a format", "give a record written by headroom");
  c.figures = figures_from(Reader(r.field("figures"), file, place + " figures"));
  c.faults = fault_counts(r, "faults");
  c.fault_details = r.strings("fault_details");
  c.within_budget = r.boolean("within_budget");
  c.reasons = r.strings("reasons");
  c.replay = r.str("replay");
  c.ulp_histogram = r.numbers("ulp_histogram");
  for (double n : c.ulp_histogram)
    if (!(n >= 0) || !std::isfinite(n) || n != std::floor(n))
      r.fail("ulp_histogram", "holds " + fmt_number(n) + ", not a count", "give a record written by headroom");
  // Added after schema 1 was first written: records without it still read.
  if (r.has("limits")) c.limits = limits_from(Reader(r.field("limits"), file, place + " limits"));
  if (r.has("reference_certified")) c.reference_certified = r.boolean("reference_certified");
  if (r.has("backward")) c.backward = backward_from(Reader(r.field("backward"), file, place + " backward"));
  return c;
}

RunRecord run_record_from_json(const json& j, const std::string& file) {
  const Reader r(j, file, "record");
  RunRecord rec;
  rec.schema = r.integer<int>("schema");
  if (rec.schema != kRecordSchema)
    r.fail("schema", "is " + std::to_string(rec.schema) + ", this headroom reads " + std::to_string(kRecordSchema),
           "re-run with the headroom that wrote it, or regenerate the record");
  rec.tool = r.str("tool");
  rec.command = r.one_of("command", {"qualify", "hunt", "replay", "merge"});
  rec.kernel = r.str("kernel");
  if (!valid_kernel_name(rec.kernel))
    r.fail("kernel", quote_input(rec.kernel) + " is not a kernel name (1 to 64 of a-z 0-9 _ . -)",
           "give a record written by headroom");
  rec.kernel_description = r.str("kernel_description");
  rec.input_format = r.str("input_format");
  rec.output_format = r.str("output_format");
  if (!parse_format(rec.input_format))
    r.fail("input_format", quote_input(rec.input_format) + " is not a format", "give a record written by headroom");
  if (!parse_format(rec.output_format))
    r.fail("output_format", quote_input(rec.output_format) + " is not a format", "give a record written by headroom");
  rec.suite = r.str("suite");
  rec.budget = r.str("budget");
  rec.shard = r.str("shard");
  const std::optional<Shard> shard = shard_of(rec.shard);
  if (!shard && (rec.shard != "merged" || rec.command != "merge"))
    r.fail("shard", quote_input(rec.shard) + " is neither i/n with 1 ≤ i ≤ n ≤ 100000 nor \"merged\"",
           "give a record written by headroom qualify --shard i/n or by headroom merge");
  // Added with `merge --allow-partial`: records without it are complete.
  if (r.has("missing_shards")) rec.missing_shards = r.strings("missing_shards");
  for (const auto& m : rec.missing_shards)
    if (rec.shard != "merged" || !shard_of(m))
      r.fail("missing_shards", quote_input(m) + (rec.shard != "merged" ? " in a record that is not merged" : " is not i/n"),
             "give a record written by headroom merge");
  const json& cases = r.field("cases");
  if (!cases.is_array()) r.fail("cases", "is not an array", "write an array of case records");
  std::map<std::string, std::string> seen;  // case name → where
  auto claim = [&](const std::string& name, const std::string& where) {
    if (auto [it, fresh] = seen.emplace(name, where); !fresh)
      throw InputError(file, where, "case " + quote_input(name) + " is also " + it->second,
                       "give a record written by headroom: a case appears once");
  };
  for (std::size_t i = 0; i < cases.size(); ++i) {
    const std::string where = "cases[" + std::to_string(i) + "]";
    rec.cases.push_back(case_record_from_json(cases[i], file, where));
    claim(rec.cases.back().name, where + " field \"name\"");
  }
  rec.skipped = r.strings("skipped");
  for (std::size_t i = 0; i < rec.skipped.size(); ++i) {
    const std::string where = "skipped[" + std::to_string(i) + "]";
    const std::string name = rec.skipped[i].substr(0, rec.skipped[i].find(": "));
    if (!valid_record_case_name(name) || name.size() == rec.skipped[i].size())
      throw InputError(file, where, quote_input(rec.skipped[i]) + " is not \"name: reason\" with a valid case name",
                       "give a record written by headroom");
    claim(name, where);
  }
  // Added after schema 1 was first written: records without it still read (as none).
  if (r.has("tolerated_faults")) rec.tolerated_faults = fault_classes(r, "tolerated_faults");
  if (r.has("warnings")) rec.warnings = r.strings("warnings");
  // Added with max_growth_exponent (budget-format.md): records without it have none.
  if (r.has("growth_limit")) rec.growth_limit = r.size_like("growth_limit");
  if (r.has("growth_limit_origin")) rec.growth_limit_origin = r.str("growth_limit_origin");
  // The summary fields are derived from the cases: a record that disagrees with itself is damaged.
  const std::string verdict = r.str("verdict");
  if (verdict != rec.verdict())
    r.fail("verdict", quote_input(verdict) + " where the cases give \"" + rec.verdict() + "\"",
           "give a record written by headroom (verdict: pass, fail, partial_pass or partial_fail)");
  if (fault_counts(r, "faults") != rec.fault_totals())
    r.fail("faults", "are not the sums of the cases' fault counts", "give a record written by headroom");
  // Added with the level takes: records without them still read. Both are
  // derived (verdict_line(), level_takes()); a record whose summary disagrees
  // with its own cases is damaged or edited.
  if (r.has("verdict_line") && r.str("verdict_line") != rec.verdict_line())
    r.fail("verdict_line", quote_input(r.str("verdict_line")) + " where the cases give " + quote_input(rec.verdict_line()),
           "give a record written by headroom");
  if (r.has("levels")) {
    if (r.field("levels") != levels_json(rec))
      r.fail("levels", "are not the level takes the cases and skipped lines give", "give a record written by headroom");
  }
  return rec;
}

RunRecord read_run_record(const std::filesystem::path& path) {
  const std::string file = path.string();
  const std::string text = read_input_file(path, kRecordFile);
  return run_record_from_json(parse_json_input(text, file, "give a record written by headroom --json"), file);
}

void write_run_record(const RunRecord& r, const std::filesystem::path& path) {
  write_file_atomically(path, to_json(r).dump(2) + "\n");
}

}  // namespace headroom
