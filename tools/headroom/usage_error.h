// headroom — usage errors as one line naming the option and the fix.
//
// CLI11's own messages ("A subcommand is required", "The following arguments
// were not expected", "dirs is required", a range ending in a 300-digit
// number) name neither the fix nor the nearest valid spelling. These turn a
// parse failure into "headroom <command>: <what> (fix: <what to do>)".
#pragma once

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

/// Returns: a validator for a number of seconds > 0 (and finite), whose
/// message names the fix.
CLI::Validator positive_seconds();

}  // namespace headroom::cli
