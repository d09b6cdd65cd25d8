// headroom — how a subcommand plugs into the command line.
//
// Each subcommand lives in its own cmd_<name>.cpp and registers itself with a
// static CommandRegistration, so adding one touches no other file:
//
//   static headroom::cli::CommandRegistration reg{"kernels", 50, [](CLI::App& app) {
//     auto* cmd = app.add_subcommand("kernels", "List the bundled kernels");
//     ...
//     cmd->callback([=] { headroom::cli::exit_with(run(...)); });
//   }};
//
// Exit codes: 0 success / within budget, 1 outside budget or regression,
// 2 bad usage or bad input (an InputError, printed as one line).
#pragma once

#include <functional>
#include <string>

#include <CLI/CLI.hpp>

namespace headroom::cli {

using AddCommand = std::function<void(CLI::App&)>;

struct CommandRegistration {
  /// order: position in `headroom --help` (smaller first).
  CommandRegistration(std::string name, int order, AddCommand add);
};

/// Returns: the headroom binary as the user invoked it (argv[0]), for replay
/// commands that must run without headroom on PATH.
const std::string& invoked_as();
void set_invoked_as(std::string argv0);

/// Ends the process after the callback with `code` (flushes stdout/stderr).
[[noreturn]] void exit_with(int code);

}  // namespace headroom::cli
