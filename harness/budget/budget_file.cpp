// headroom — reading a budget file (TOML, docs/budget-format.md) into a Budget (budget.h).
//
// Every error names the file, the line and column toml++ records for the
// offending node, and the fix; nothing in a budget file is ignored silently.
#include <algorithm>
#include <cmath>
#include <cstdio>
#include <fstream>
#include <map>
#include <sstream>
#include <string>

#include <toml++/toml.h>

#include "headroom/budget.h"
#include "headroom/input_error.h"
#include "headroom/input_file.h"
#include "headroom/nearest_name.h"

namespace headroom {
namespace {

constexpr const char* kFormats = "float64, float32, binary16, bfloat16, int8";
constexpr const char* kKeys =
    "max_ulp, max_scaled_error, max_rel_rmse, max_ratio_to_plain, max_growth_exponent, max_gradient_scaled_error, "
    "max_gradient_ratio_to_plain, tolerated_faults, score_bits";

std::string place(const toml::source_region& r) {
  return "line " + std::to_string(r.begin.line) + ", column " + std::to_string(r.begin.column);
}

std::string type_text(const toml::node& n) {
  switch (n.type()) {
    case toml::node_type::table: return "a table";
    case toml::node_type::array: return "an array";
    case toml::node_type::string: return "a string";
    case toml::node_type::integer: return "an integer";
    case toml::node_type::floating_point: return "a floating-point number";
    case toml::node_type::boolean: return "a boolean";
    case toml::node_type::date:
    case toml::node_type::time:
    case toml::node_type::date_time: return "a date or time";
    case toml::node_type::none: break;
  }
  return "nothing";
}

std::string all_fault_names() {
  std::string t;
  for (FaultClass c : kAllFaultClasses) t += (t.empty() ? "" : ", ") + std::string(fault_class_name(c));
  return t;
}

class Reader {
 public:
  explicit Reader(const std::string& path) : path_(path) {}

  [[noreturn]] void fail(const toml::source_region& at, const std::string& problem, const std::string& fix) const {
    throw InputError(path_, place(at), problem, fix);
  }
  std::string origin(const toml::node& n) const {
    return path_ + " line " + std::to_string(n.source().begin.line);
  }

  // A number ≥ 0 (inf allowed: no limit) for key `key`.
  double non_negative(const std::string& key, const toml::node& n) const {
    double v = 0;
    if (auto i = n.as_integer()) {
      v = static_cast<double>(i->get());
    } else if (auto f = n.as_floating_point()) {
      v = f->get();
    } else {
      fail(n.source(), key + " must be a number, found " + type_text(n), "write a number, e.g. " + key + " = 8");
    }
    if (std::isnan(v)) fail(n.source(), key + " is nan", "give a number >= 0, or \"none\" for no limit");
    if (v < 0) {
      char text[40];
      std::snprintf(text, sizeof text, "%g", v);
      fail(n.source(), key + " is negative (" + text + ")", "give a limit >= 0, or \"none\" for no limit");
    }
    return v;
  }

  Limit limit(const std::string& key, const toml::node& n, bool integer_only, bool allow_lambda) const {
    Limit l;
    l.origin = origin(n);
    if (auto s = n.as_string()) {
      if (s->get() == "none") return l;
      fail(n.source(), key + " = \"" + s->get() + "\" is not a limit",
           "write a number, \"none\"" + std::string(allow_lambda ? ", or { lambda = 4 }" : ""));
    }
    if (auto t = n.as_table()) {
      if (!allow_lambda) {
        fail(n.source(), key + " takes a fixed number, found a table", "write a number, e.g. " + key + " = 4, or \"none\"");
      }
      return lambda_limit(key, *t, l.origin);
    }
    if (integer_only && !n.is_integer()) {
      fail(n.source(), key + " must be an integer number of ULPs, found " + type_text(n),
           "write an integer, e.g. " + key + " = 4, or \"none\"");
    }
    if (!n.is_number()) {
      fail(n.source(), key + " must be a number" + std::string(allow_lambda ? ", \"none\" or { lambda = ... }" : " or \"none\"") +
                           ", found " + type_text(n),
           "write e.g. " + key + " = 8" + std::string(allow_lambda ? " or " + key + " = { lambda = 4 }" : ""));
    }
    const double v = non_negative(key, n);
    if (std::isinf(v)) return l;
    l.kind = Limit::Kind::fixed;
    l.value = v;
    return l;
  }

  Limit lambda_limit(const std::string& key, const toml::table& t, const std::string& where) const {
    Limit l;
    l.kind = Limit::Kind::probabilistic;
    l.origin = where;
    bool have_lambda = false;
    for (auto&& [k, v] : t) {
      const std::string name(k.str());
      if (name == "lambda") {
        l.lambda = non_negative(key + ".lambda", v);
        if (!(l.lambda > 0) || std::isinf(l.lambda)) {
          fail(v.source(), key + ".lambda must be finite and > 0", "give a small constant, e.g. lambda = 4");
        }
        have_lambda = true;
      } else if (name == "working_bits") {
        auto i = v.as_integer();
        if (!i || i->get() < 2 || i->get() > 64) {
          fail(v.source(), key + ".working_bits must be an integer from 2 to 64, found " + type_text(v),
               "give the precision p of the kernel's arithmetic (u = 2^-p), e.g. working_bits = 11");
        }
        l.working_bits = static_cast<int>(i->get());
      } else if (name == "ceiling") {
        auto b = v.as_boolean();
        if (!b) fail(v.source(), key + ".ceiling must be true or false, found " + type_text(v), "write ceiling = true");
        l.ceiling = b->get();
      } else {
        fail(k.source(), "unknown key \"" + name + "\" in " + key, "use lambda, working_bits and ceiling");
      }
    }
    if (!have_lambda) fail(t.source(), key + " = { ... } has no lambda", "write e.g. " + key + " = { lambda = 4 }");
    return l;
  }

  std::vector<FaultClass> faults(const toml::node& n) const {
    auto a = n.as_array();
    if (!a) {
      fail(n.source(), "tolerated_faults must be an array of fault class names, found " + type_text(n),
           "write e.g. tolerated_faults = [\"nondeterministic\"], or [] for none");
    }
    std::vector<FaultClass> out;
    for (const toml::node& e : *a) {
      auto s = e.as_string();
      if (!s) fail(e.source(), "tolerated_faults holds " + type_text(e), "give fault class names as strings");
      auto c = parse_fault_class(s->get());
      if (!c) fail(e.source(), "unknown fault class \"" + s->get() + "\"", "use one of " + all_fault_names());
      out.push_back(*c);
    }
    return out;
  }

  BudgetSection section(const std::string& title, const toml::node& n) const {
    auto t = n.as_table();
    if (!t) fail(n.source(), title + " must be a table, found " + type_text(n), "write [" + title + "] and keys below it");
    BudgetSection s;
    for (auto&& [k, v] : *t) {
      const std::string key(k.str());
      if (key == "max_ulp") {
        s.max_ulp = limit(key, v, true, false);
      } else if (key == "max_scaled_error") {
        s.max_scaled_error = limit(key, v, false, true);
      } else if (key == "max_rel_rmse") {
        s.max_rel_rmse = limit(key, v, false, true);
      } else if (key == "max_ratio_to_plain") {
        s.max_ratio_to_plain = limit(key, v, false, false);
      } else if (key == "max_growth_exponent") {
        s.max_growth_exponent = limit(key, v, false, false);
      } else if (key == "max_gradient_scaled_error") {
        s.max_gradient_scaled_error = limit(key, v, false, true);
      } else if (key == "max_gradient_ratio_to_plain") {
        s.max_gradient_ratio_to_plain = limit(key, v, false, false);
      } else if (key == "tolerated_faults") {
        s.tolerated_faults = faults(v);
        s.tolerated_origin = origin(v);
      } else if (key == "score_bits") {
        auto i = v.as_integer();
        if (!i || i->get() < 2 || i->get() > 64) {
          fail(v.source(), "score_bits must be an integer from 2 to 64, found " + type_text(v),
               "give the precision p of the arithmetic the kernel forms scores in, e.g. score_bits = 11");
        }
        s.score_bits = static_cast<int>(i->get());
        s.score_bits_origin = origin(v);
      } else {
        fail(k.source(), "unknown key \"" + key + "\" in [" + title + "]",
             key == "max_rmse" ? "the RMSE limit is relative: write max_rel_rmse" : std::string("use ") + kKeys);
      }
    }
    return s;
  }

  Budget read(const toml::table& root) const {
    Budget b;
    b.source = path_;
    for (auto&& [k, v] : root) {
      const std::string key(k.str());
      if (key == "version") {
        auto i = v.as_integer();
        if (!i || i->get() != 1) {
          fail(v.source(), "version must be 1, found " + (i ? std::to_string(i->get()) : type_text(v)),
               "write version = 1 (the only budget format so far)");
        }
      } else if (key == "format") {
        auto t = v.as_table();
        if (!t) fail(v.source(), "format must be a table of [format.<name>] sections", "write [format.float32] sections");
        // toml++ iterates keys in sorted order; a duplicate is cited where it comes later in the file.
        std::map<Format, const toml::key*> seen;
        for (auto&& [fk, fv] : *t) {
          const std::string name(fk.str());
          auto f = parse_format(name);
          if (!f) fail(fk.source(), "unknown format \"" + name + "\"", std::string("use one of ") + kFormats);
          if (auto [at, fresh] = seen.emplace(*f, &fk); !fresh) {
            const toml::key& first = *at->second;
            const bool later = fk.source().begin.line > first.source().begin.line;
            const toml::key& again = later ? fk : first;
            fail(again.source(), "format " + std::string(format_name(*f)) + " is given twice (as \"" +
                                     std::string(first.str()) + "\" and \"" + name + "\")",
                 "merge the two sections into one");
          }
          b.formats.emplace(*f, section("format." + name, fv));
        }
      } else if (key == "kernel") {
        auto t = v.as_table();
        if (!t) fail(v.source(), "kernel must be a table of [kernel.<name>] sections", "write [kernel.<name>] sections");
        for (auto&& [kk, kv] : *t) {
          const std::string name(kk.str());
          b.kernels.emplace(name, section("kernel." + name, kv));  // TOML itself refuses a duplicate key
          b.kernel_lines.emplace(name, static_cast<int>(kk.source().begin.line));
        }
      } else {
        fail(k.source(), "unknown key \"" + key + "\" at the top level",
             "use version = 1, [format.<input format>] and [kernel.<name>] sections");
      }
    }
    return b;
  }

 private:
  std::string path_;
};

template <class T>
void over(T& into, const std::optional<T>& from) {
  if (from) into = *from;
}

void apply(KernelBudget& b, const BudgetSection& s) {
  over(b.max_ulp, s.max_ulp);
  over(b.max_scaled_error, s.max_scaled_error);
  over(b.max_rel_rmse, s.max_rel_rmse);
  over(b.max_ratio_to_plain, s.max_ratio_to_plain);
  over(b.max_growth_exponent, s.max_growth_exponent);
  over(b.max_gradient_scaled_error, s.max_gradient_scaled_error);
  over(b.max_gradient_ratio_to_plain, s.max_gradient_ratio_to_plain);
  if (s.tolerated_faults) {
    b.tolerated_faults = *s.tolerated_faults;
    b.tolerated_origin = s.tolerated_origin;
  }
  if (s.score_bits) {
    b.score_bits = *s.score_bits;
    b.score_bits_origin = s.score_bits_origin;
  }
}

}  // namespace

Budget parse_budget(std::string_view text, const std::string& path) {
  toml::table root;
  try {
    root = toml::parse(text, path);
  } catch (const toml::parse_error& e) {
    throw InputError(path, place(e.source()), "not valid TOML: " + std::string(e.description()),
                     "correct the syntax there (TOML 1.0; docs/budget-format.md)");
  }
  return Reader(path).read(root);
}

Budget load_budget(const std::string& path) {
  // A budget is a page of TOML; the cap only guards against a wrong, huge file.
  static constexpr InputKind kBudgetFile{"budget file", std::uint64_t{1} << 20,
                                         "give the path of a budget file (TOML, docs/budget-format.md)"};
  return parse_budget(read_input_file(path, kBudgetFile), path);
}

std::string Budget::Unmatched::text() const {
  return source + " line " + std::to_string(line) + ": [kernel." + name +
         "] names no kernel of this run, so it is not applied" +
         (suggestion.empty() ? "" : " (did you mean [kernel." + suggestion + "]?)");
}

std::vector<Budget::Unmatched> Budget::unmatched_kernel_sections(const std::vector<std::string>& run_kernels,
                                                                 const std::vector<std::string>& also_known) const {
  // The run's own kernels first: a typo of the kernel being judged is the costly one.
  std::vector<std::string> candidates = run_kernels;
  candidates.insert(candidates.end(), also_known.begin(), also_known.end());
  std::vector<Unmatched> out;
  for (const auto& [name, section] : kernels) {
    if (std::find(candidates.begin(), candidates.end(), name) != candidates.end()) continue;
    const auto line = kernel_lines.find(name);
    out.push_back({name, line == kernel_lines.end() ? 0 : line->second, nearest_name(name, candidates), source});
  }
  std::sort(out.begin(), out.end(), [](const Unmatched& a, const Unmatched& b) { return a.line < b.line; });
  return out;
}

KernelBudget Budget::for_kernel(std::string_view name, Format input) const {
  KernelBudget b = default_budget(input);
  if (auto f = formats.find(input); f != formats.end()) apply(b, f->second);
  if (auto k = kernels.find(std::string(name)); k != kernels.end()) apply(b, k->second);
  return b;
}

}  // namespace headroom
