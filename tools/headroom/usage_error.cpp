// headroom — usage errors as one line naming the option and the fix (usage_error.h).
#include "usage_error.h"

#include <cctype>
#include <charconv>
#include <cmath>
#include <cstdio>
#include <cstdlib>

#include "headroom/input_error.h"
#include "headroom/nearest_name.h"

namespace headroom::cli {
namespace {

std::vector<std::string> subcommand_names(CLI::App& app) {
  std::vector<std::string> out;
  for (CLI::App* s : app.get_subcommands([](CLI::App*) { return true; })) out.push_back(s->get_name());
  return out;
}

// The commands `args` names, outermost first ("qualify"; "case", "make").
std::vector<CLI::App*> command_chain(CLI::App& app, const std::vector<std::string>& args) {
  std::vector<CLI::App*> chain{&app};
  for (const auto& a : args) {
    if (a.empty() || a[0] == '-') continue;
    CLI::App* sub = nullptr;
    try {
      sub = chain.back()->get_subcommand(a);
    } catch (const CLI::OptionNotFound&) {
      sub = nullptr;
    }
    if (sub) chain.push_back(sub);
  }
  return chain;
}

std::string path_of(const std::vector<CLI::App*>& chain) {
  std::string out = "headroom";
  for (std::size_t i = 1; i < chain.size(); ++i) out += " " + chain[i]->get_name();
  return out;
}

std::vector<std::string> option_names(const CLI::App& cmd) {
  std::vector<std::string> out;
  for (const CLI::Option* o : cmd.get_options()) {
    for (const auto& l : o->get_lnames()) out.push_back("--" + l);
    for (const auto& s : o->get_snames()) out.push_back("-" + s);
  }
  return out;
}

std::string help_hint(const std::vector<CLI::App*>& chain) { return "`" + path_of(chain) + " --help` lists the options"; }

}  // namespace

std::optional<std::string> unknown_command(CLI::App& app, const std::vector<std::string>& args) {
  CLI::App* at = &app;
  for (const auto& a : args) {
    if (a.empty() || a[0] == '-') return std::nullopt;  // options from here on: CLI11 judges them
    const auto names = subcommand_names(*at);
    if (names.empty()) return std::nullopt;
    CLI::App* sub = nullptr;
    try {
      sub = at->get_subcommand(a);
    } catch (const CLI::OptionNotFound&) {
      sub = nullptr;
    }
    if (!sub) {
      const std::string where = at == &app ? "headroom" : "headroom " + at->get_name();
      std::string list;
      for (const auto& n : names) list += (list.empty() ? "" : ", ") + n;
      const std::string near = nearest_name(a, names);
      return where + ": unknown command \"" + a + "\" (fix: " +
             (near.empty() ? "use one of " + list : "did you mean `" + where + " " + near + "`?") + "; `" + where +
             " --help` lists the commands)";
    }
    at = sub;
  }
  return std::nullopt;
}

std::string usage_error(CLI::App& app, const std::vector<std::string>& args, const CLI::ParseError& e) {
  const std::vector<CLI::App*> chain = command_chain(app, args);
  CLI::App& cmd = *chain.back();
  const std::string where = path_of(chain);
  if (dynamic_cast<const CLI::ExtrasError*>(&e) != nullptr) {
    const auto known = option_names(cmd);
    for (const auto& a : args) {
      if (a.size() < 2 || a[0] != '-') continue;
      const std::string name = a.substr(0, a.find('='));
      if (std::find(known.begin(), known.end(), name) != known.end()) continue;
      bool elsewhere = false;  // an option of an outer command, e.g. --version
      for (CLI::App* outer : chain) {
        const auto names = option_names(*outer);
        elsewhere = elsewhere || std::find(names.begin(), names.end(), name) != names.end();
      }
      if (elsewhere) continue;
      const std::string near = nearest_name(name, known);
      return where + ": unknown option " + name + " (fix: " + (near.empty() ? "" : "did you mean " + near + "? ") +
             help_hint(chain) + ")";
    }
    std::string what = e.what();
    const auto colon = what.find(": ");
    return where + ": unexpected argument" + (colon == std::string::npos ? "" : " " + what.substr(colon + 2)) +
           " (fix: drop it, or quote a value that holds spaces; " + help_hint(chain) + ")";
  }
  if (dynamic_cast<const CLI::RequiredError*>(&e) != nullptr) {
    for (const CLI::Option* o : cmd.get_options()) {
      if (!o->get_required() || o->count() > 0) continue;
      const bool positional = o->get_lnames().empty() && o->get_snames().empty();
      const std::string name = positional ? o->get_name() : "--" + o->get_lnames().front();
      return where + ": " + (positional ? "the argument " + name + " is missing" : name + " is required") + " (fix: add " +
             (positional ? o->get_description() : name + " " + o->get_type_name() + ": " + o->get_description()) + ")";
    }
    if (cmd.get_require_subcommand_min() > 0 && cmd.get_subcommands().empty()) {
      std::string list;
      for (const auto& n : subcommand_names(cmd)) list += (list.empty() ? "" : ", ") + n;
      return where + ": no command given (fix: use one of " + list + "; `" + where + " --help` says what each does)";
    }
  }
  const std::string what = e.what();
  // A value validator (integer_in, number_in) has named its own fix.
  if (dynamic_cast<const CLI::ValidationError*>(&e) != nullptr && what.find(" (fix: ") != std::string::npos)
    return where + ": " + what;
  return where + ": " + what + " (fix: " + help_hint(chain) + ")";
}

namespace {

// "from 0 to 1024": the range as the messages say it.
std::string range_text(double lo, bool lo_open, double hi) {
  auto num = [](double v) {
    char buf[32];
    std::snprintf(buf, sizeof buf, "%.15g", v);
    return std::string(buf);
  };
  return lo_open ? "above " + num(lo) + " and at most " + num(hi) : "from " + num(lo) + " to " + num(hi);
}

std::string value_fix(const std::string& name, const std::string& example, const std::string& note) {
  return " (fix: write e.g. " + name + " " + example + (note.empty() ? "" : "; " + note) + ")";
}

}  // namespace

namespace {

// The integer `text` as written, strictly: decimal, no spaces, no '+', no
// exponent, within [lo, hi] (hi read as unsigned when `hi_unsigned`).
bool integer_within(const std::string& text, std::int64_t lo, std::uint64_t hi, bool hi_unsigned) {
  const char* first = text.data();
  const char* last = first + text.size();
  if (text.empty()) return false;
  if (text[0] == '-') {
    std::int64_t v = 0;
    const auto [end, ec] = std::from_chars(first, last, v);
    return ec == std::errc{} && end == last && v >= lo &&
           (hi_unsigned || v <= static_cast<std::int64_t>(hi));
  }
  std::uint64_t v = 0;
  const auto [end, ec] = std::from_chars(first, last, v);
  if (ec != std::errc{} || end != last) return false;
  if (lo > 0 && v < static_cast<std::uint64_t>(lo)) return false;
  return hi_unsigned ? v <= hi : static_cast<std::int64_t>(hi) >= 0 && v <= hi;
}

CLI::Validator integer_validator(const std::string& name, std::int64_t lo, std::uint64_t hi, bool hi_unsigned,
                                 const std::string& range, const std::string& example, const std::string& note) {
  return CLI::Validator(
      [=](std::string& text) -> std::string {
        // A value CLI11 would wrap (-1 as unsigned) or round never reaches the option.
        if (integer_within(text, lo, hi, hi_unsigned)) return {};
        return quote_input(text, 40) + " is not " + range + value_fix(name, example, note);
      },
      "INT");
}

}  // namespace

CLI::Validator integer_in(const std::string& name, std::int64_t lo, std::int64_t hi, const std::string& example,
                          const std::string& note) {
  return integer_validator(name, lo, static_cast<std::uint64_t>(hi), false,
                           "an integer " + range_text(static_cast<double>(lo), false, static_cast<double>(hi)), example,
                           note);
}

CLI::Validator seed_value(const std::string& name) {
  return integer_validator(name, 0, UINT64_MAX, true, "an integer from 0 to 18446744073709551615 (2^64 - 1)", "1", "");
}

CLI::Validator number_in(const std::string& name, double lo, bool lo_open, double hi, const std::string& example,
                         const std::string& note) {
  const std::string range = "a number " + range_text(lo, lo_open, hi);
  return CLI::Validator(
      [=](std::string& text) -> std::string {
        char* end = nullptr;
        const double v = std::strtod(text.c_str(), &end);
        const bool ok = !text.empty() && end == text.c_str() + text.size() && std::isfinite(v) &&
                        (lo_open ? v > lo : v >= lo) && v <= hi && !std::isspace(static_cast<unsigned char>(text[0]));
        if (ok) return {};
        return quote_input(text, 40) + " is not " + range + value_fix(name, example, note);
      },
      "NUMBER");
}

CLI::Validator seconds_in(const std::string& name) {
  return number_in(name, 0, true, kMaxSeconds, "20", "a number of seconds");
}

}  // namespace headroom::cli
