// headroom — the run record and its JSON form (record.h, docs/result-schema.md).
#include "headroom/record.h"

#include <cmath>
#include <fstream>
#include <limits>
#include <sstream>

#include "headroom/atomic_file.h"
#include "headroom/error_growth.h"
#include "headroom/families.h"
#include "headroom/input_error.h"

namespace headroom {
namespace {

using nlohmann::json;

json number(double x) { return json_number(x); }

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
  CaseFigures f;
  f.elements = r.integer<std::int64_t>("elements");
  f.max_ulp = r.num("max_ulp");
  f.max_scaled_error = r.num("max_scaled_error");
  f.max_abs_error = r.num("max_abs_error");
  f.rmse = r.num("rmse");
  f.relative_rmse = r.num("relative_rmse");
  f.relative_l1 = r.num("relative_l1");
  f.cosine = r.num("cosine");
  f.lse_error = r.num("lse_error");
  f.ratio_to_plain = r.num("ratio_to_plain");
  f.input_error = r.num("input_error");
  // Absent from records written before P rounding was measured.
  f.p_rounding_error = r.has("p_rounding_error") ? r.num("p_rounding_error") : std::numeric_limits<double>::quiet_NaN();
  f.kernel_error = r.num("kernel_error");
  f.worst_index = r.str("worst_index");
  f.worst_expected = r.num("worst_expected");
  f.worst_obtained = r.num("worst_obtained");
  // Added after schema 1 was first written: records without it still read (as NaN).
  if (r.has("worst_ulp_at")) f.worst_ulp_at = r.num("worst_ulp_at");
  return f;
}

json limits_json(const CaseLimits& l) {
  return {{"max_ulp", number(l.max_ulp)},
          {"max_scaled_error", number(l.max_scaled_error)},
          {"max_rel_rmse", number(l.max_rel_rmse)},
          {"max_ratio_to_plain", number(l.max_ratio_to_plain)}};
}

CaseLimits limits_from(const Reader& r) {
  CaseLimits l;
  l.max_ulp = r.num("max_ulp");
  l.max_scaled_error = r.num("max_scaled_error");
  l.max_rel_rmse = r.num("max_rel_rmse");
  l.max_ratio_to_plain = r.num("max_ratio_to_plain");
  return l;
}

// Returns: "line L, column C" of byte offset `byte` in `text` (1-based).
std::string line_column(const std::string& text, std::size_t byte) {
  std::size_t line = 1, column = 1;
  for (std::size_t i = 0; i < byte && i < text.size(); ++i) {
    if (text[i] == '\n') {
      ++line;
      column = 1;
    } else {
      ++column;
    }
  }
  return "line " + std::to_string(line) + ", column " + std::to_string(column);
}

}  // namespace

nlohmann::json json_number(double x) {
  if (std::isnan(x)) return "nan";
  if (std::isinf(x)) return x > 0 ? "inf" : "-inf";
  return x;
}

std::string RunRecord::verdict() const {
  for (const auto& c : cases)
    if (!c.within_budget) return "fail";
  return growth_failures().empty() ? "pass" : "fail";
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
  return {{"name", c.name},
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
  json levels = json::array();
  for (const LevelTake& t : r.level_takes())
    levels.push_back({{"level", t.level}, {"taken", t.taken}, {"of", t.of}, {"thin", t.thin()}});
  json cases = json::array();
  for (const auto& c : r.cases) cases.push_back(to_json(c));
  return {{"schema", r.schema},
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
          {"levels", levels},
          {"faults", r.fault_totals()},
          {"tolerated_faults", r.tolerated_faults},
          {"cases", cases},
          {"skipped", r.skipped},
          {"warnings", r.warnings},
          {"growth_limit", json_number(r.growth_limit)},
          {"growth_limit_origin", r.growth_limit_origin},
          {"error_growth", growth_json(error_growth(r.cases))}};
}

CaseRecord case_record_from_json(const json& j, const std::string& file, const std::string& place) {
  const Reader r(j, file, place);
  CaseRecord c;
  c.name = r.str("name");
  c.family = r.str("family");
  c.seed = r.integer<std::uint64_t>("seed");
  c.size = r.integer<int>("size");
  c.level = r.str("level");
  c.shape = r.str("shape");
  c.kv_len = r.integer<std::int64_t>("kv_len");
  c.logit_scale = r.num("logit_scale");
  c.mask = r.str("mask");
  c.format = r.str("format");
  c.figures = figures_from(Reader(r.field("figures"), file, place + " figures"));
  const json& faults = r.field("faults");
  if (!faults.is_object()) r.fail("faults", "is not an object", "write {\"class\": count, ...}");
  for (const auto& [name, n] : faults.items()) {
    if (!n.is_number_integer() || n.get<std::int64_t>() < 0)
      r.fail("faults", "count of \"" + name + "\" is not a non-negative integer", "write a count");
    c.faults[name] = n.get<int>();
  }
  c.fault_details = r.strings("fault_details");
  c.within_budget = r.boolean("within_budget");
  c.reasons = r.strings("reasons");
  c.replay = r.str("replay");
  c.ulp_histogram = r.numbers("ulp_histogram");
  // Added after schema 1 was first written: records without it still read.
  if (r.has("limits")) c.limits = limits_from(Reader(r.field("limits"), file, place + " limits"));
  if (r.has("reference_certified")) c.reference_certified = r.boolean("reference_certified");
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
  rec.command = r.str("command");
  rec.kernel = r.str("kernel");
  rec.kernel_description = r.str("kernel_description");
  rec.input_format = r.str("input_format");
  rec.output_format = r.str("output_format");
  rec.suite = r.str("suite");
  rec.budget = r.str("budget");
  rec.shard = r.str("shard");
  const json& cases = r.field("cases");
  if (!cases.is_array()) r.fail("cases", "is not an array", "write an array of case records");
  for (std::size_t i = 0; i < cases.size(); ++i)
    rec.cases.push_back(case_record_from_json(cases[i], file, "cases[" + std::to_string(i) + "]"));
  rec.skipped = r.strings("skipped");
  // Added after schema 1 was first written: records without it still read (as none).
  if (r.has("tolerated_faults")) rec.tolerated_faults = r.strings("tolerated_faults");
  if (r.has("warnings")) rec.warnings = r.strings("warnings");
  if (r.has("growth_limit")) rec.growth_limit = r.num("growth_limit");
  if (r.has("growth_limit_origin")) rec.growth_limit_origin = r.str("growth_limit_origin");
  return rec;
}

RunRecord read_run_record(const std::filesystem::path& path) {
  const std::string file = path.string();
  std::ifstream in(path, std::ios::binary);
  if (!in) throw InputError(file, "file", "cannot be opened", "check the path of the JSON record");
  std::stringstream buffer;
  buffer << in.rdbuf();
  const std::string text = buffer.str();
  json j;
  try {
    j = json::parse(text);
  } catch (const json::parse_error& e) {
    throw InputError(file, line_column(text, e.byte == 0 ? 0 : e.byte - 1), "not valid JSON",
                     "give a record written by headroom --json");
  } catch (const json::out_of_range& e) {
    // A number beyond double's range (1e400) has no byte position in nlohmann's error.
    throw InputError(file, "a number", std::string("not valid JSON: ") + e.what(), "give a record written by headroom --json");
  }
  return run_record_from_json(j, file);
}

void write_run_record(const RunRecord& r, const std::filesystem::path& path) {
  write_file_atomically(path, to_json(r).dump(2) + "\n");
}

}  // namespace headroom
