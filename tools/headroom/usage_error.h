// headroom — usage errors as one line naming the option and the fix.
//
// CLI11's own messages ("A subcommand is required", "The following arguments
// were not expected", "dirs is required", a range ending in a 300-digit
// number) name neither the fix nor the nearest valid spelling. These turn a
// parse failure into "headroom <command>: <what> (fix: <what to do>)".
#pragma once

#include <cstdint>
#include <optional>
#include <string>
#include <vector>

#include <CLI/CLI.hpp>

namespace headroom::cli {

/// Returns: the one-line message for a command line that names an unknown
/// command (with the nearest valid one), or "help"-less nothing: nullopt when
/// every command word in `args` (argv without argv[0]) is known to `app`.
std::optional<std::string> unknown_command(CLI::App& app, const std::vector<std::string>& args);

/// Returns: the one-line message for parse error `e` of `args` against `app`:
/// an unknown option gets the nearest option of its command, a missing
/// required option or argument its description, anything else CLI11's text
/// with the help command that lists the options.
std::string usage_error(CLI::App& app, const std::vector<std::string>& args, const CLI::ParseError& e);

/// Returns: a validator for option `name` whose value must be a decimal
/// integer in [lo, hi]. Its message names the value, the range and the fix
/// ("write e.g. <name> <example>", then `note` when given), so a value the
/// program cannot honour is refused by the parser, before any work.
CLI::Validator integer_in(const std::string& name, std::int64_t lo, std::int64_t hi, const std::string& example,
                          const std::string& note = "");

/// Returns: the validator of a seed: a decimal integer from 0 to 2^64 − 1.
CLI::Validator seed_value(const std::string& name);

/// The most reference threads an option may ask for: worker threads are
/// started up to this many at once (one per row block), and thousands would
/// meet the per-user process limit rather than run faster.
inline constexpr std::int64_t kMaxThreads = 1024;

/// Returns: a validator for option `name` whose value must be a finite number
/// x with lo < x ≤ hi (lo_open) or lo ≤ x ≤ hi; message as integer_in's.
CLI::Validator number_in(const std::string& name, double lo, bool lo_open, double hi, const std::string& example,
                         const std::string& note = "");

/// Returns: the validator of a number of seconds: 0 < S ≤ kMaxSeconds.
CLI::Validator seconds_in(const std::string& name);

/// The longest time limit the run can honour: past 10^7 s the clocks' deadlines
/// are treated as "no limit" (process.cpp, program_session.cpp), so 10^6 s
/// (11.6 days) is the ceiling an option may ask for.
inline constexpr double kMaxSeconds = 1e6;

}  // namespace headroom::cli
