// headroom — the command line: subcommands register themselves (command.h).
#include <signal.h>

#include <algorithm>
#include <cstdio>
#include <cstdlib>
#include <iostream>
#include <vector>

#include "command.h"
#include "usage_error.h"
#include "headroom/external_program.h"
#include "headroom/input_error.h"

namespace headroom::cli {
namespace {

struct Entry {
  std::string name;
  int order;
  AddCommand add;
};

std::vector<Entry>& registry() {
  static std::vector<Entry> entries;
  return entries;
}

}  // namespace

CommandRegistration::CommandRegistration(std::string name, int order, AddCommand add) {
  registry().push_back({std::move(name), order, std::move(add)});
}

namespace {
std::string& invoked_name() {
  static std::string name = "headroom";
  return name;
}
}  // namespace

const std::string& invoked_as() { return invoked_name(); }
void set_invoked_as(std::string argv0) {
  if (!argv0.empty()) invoked_name() = std::move(argv0);
}

void exit_with(int code) {
  std::cout.flush();
  std::cerr.flush();
  std::fflush(nullptr);
  std::exit(code);
}

namespace {

// Ctrl-C, SIGTERM or a closed terminal ends headroom as it would anyway
// (finished cases are already in the journal), but first takes down a running
// external kernel program, which sits in a process group of its own, and
// removes the folder it exchanges its files through.
extern "C" void on_ending_signal(int sig) {
  headroom::kill_running_programs();
  headroom::remove_exchange_folders();
  raise(sig);  // SA_RESETHAND: the default action, once this handler returns
}

void end_programs_with_headroom() {
  for (int sig : {SIGINT, SIGTERM, SIGHUP}) {
    struct sigaction old {};
    if (sigaction(sig, nullptr, &old) != 0 || old.sa_handler == SIG_IGN) continue;  // e.g. nohup: stay ignored
    struct sigaction sa {};
    sa.sa_handler = on_ending_signal;
    sa.sa_flags = SA_RESETHAND;
    sigemptyset(&sa.sa_mask);
    sigaction(sig, &sa, nullptr);
  }
}

}  // namespace

}  // namespace headroom::cli

int main(int argc, char** argv) {
  using namespace headroom::cli;
  end_programs_with_headroom();
  set_invoked_as(argc > 0 && argv[0] != nullptr ? argv[0] : "");
  CLI::App app{"headroom — numerical qualification of softmax-attention kernels", "headroom"};
  app.require_subcommand(1);
  app.set_version_flag("--version", "headroom 0.1.0");
  auto entries = registry();
  std::stable_sort(entries.begin(), entries.end(), [](const auto& a, const auto& b) { return a.order < b.order; });
  for (auto& e : entries) e.add(app);
  std::vector<std::string> args(argv + (argc > 0 ? 1 : 0), argv + argc);
  // `headroom help [command]` is --help, as users of other tools expect.
  if (!args.empty() && args.front() == "help") {
    args.erase(args.begin());
    args.push_back("--help");
  }
  if (const auto unknown = unknown_command(app, args)) {
    std::cerr << *unknown << '\n';
    return 2;
  }
  try {
    std::vector<std::string> reversed(args.rbegin(), args.rend());  // CLI11 takes them last first
    app.parse(reversed);
  } catch (const CLI::Success& e) {
    return app.exit(e);
  } catch (const CLI::ParseError& e) {
    std::cerr << usage_error(app, args, e) << '\n';
    return 2;
  } catch (const headroom::InputError& e) {
    std::cerr << "headroom: " << e.what() << '\n';
    return 2;
  } catch (const std::exception& e) {
    std::cerr << "headroom: error: " << e.what() << '\n';
    return 2;
  }
  return 0;
}
