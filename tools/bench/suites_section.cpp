// headroom bench — the suites end to end: `headroom qualify` on a float32
// textbook plug-in for each suite, isolated and in-process (--no-isolation).
//
// Prints, per suite and mode: cases run (and skipped), the largest Tk, the
// cases at Tk ≥ 4096 and how many of them the certified reference certified,
// wall seconds, and CPU seconds of headroom and every process it started and
// waited for (the isolation worker and its per-call children included), and
// under the table each run's error growth line (error_growth.h). The
// machine may be shared: wall time includes waiting for the cores, CPU time
// does not. qualify's own defaults otherwise (reference threads: all cores).
#include <fcntl.h>
#include <sys/resource.h>
#include <sys/wait.h>
#include <unistd.h>

#include <algorithm>
#include <chrono>
#include <cstdio>
#include <filesystem>
#include <string>
#include <vector>

#include "headroom/error_growth.h"
#include "headroom/record.h"
#include "sections.h"

namespace bench {
namespace {

namespace fs = std::filesystem;

double children_cpu() {
  rusage u{};
  getrusage(RUSAGE_CHILDREN, &u);
  auto s = [](const timeval& t) { return static_cast<double>(t.tv_sec) + 1e-6 * static_cast<double>(t.tv_usec); };
  return s(u.ru_utime) + s(u.ru_stime);
}

// Runs `args` (argv[0] the program) with stdout and stderr to /dev/null. Returns its exit code, −1 if it did not exit.
int run_quietly(const std::vector<std::string>& args) {
  const pid_t pid = fork();
  if (pid == 0) {
    const int null = open("/dev/null", O_WRONLY);
    if (null >= 0) dup2(null, 1), dup2(null, 2);
    std::vector<char*> argv;
    for (const auto& a : args) argv.push_back(const_cast<char*>(a.c_str()));
    argv.push_back(nullptr);
    execv(argv[0], argv.data());
    _exit(127);
  }
  int status = 0;
  if (pid < 0 || waitpid(pid, &status, 0) != pid) return -1;
  return WIFEXITED(status) ? WEXITSTATUS(status) : -1;
}

}  // namespace

void suites_section(const Options& opt) {
  const fs::path here = fs::read_symlink("/proc/self/exe").parent_path();
  const std::string tool = (here / "headroom").string();
  std::string kernel = opt.suites_kernel;
  if (kernel.empty()) {
    // The example plug-in (examples/plugin/my_kernel.c: textbook float32), as the tests build it.
    const fs::path example = here.parent_path() / "tests" / "libexample_plugin.so";
    kernel = fs::exists(example) ? example.string() : "f32_textbook";
  }
  const fs::path json = fs::temp_directory_path() / ("headroom_bench_suites_" + std::to_string(getpid()) + ".json");
  std::printf("\nSuites: headroom qualify --kernel %s (wall and CPU seconds, CPU of every process it waited for)\n\n",
              kernel.c_str());
  std::printf("| suite | isolation | cases (skipped) | largest Tk | Tk >= 4096 (certified) | wall s | CPU s | verdict |\n"
              "|---|---|---:|---:|---:|---:|---:|---|\n");
  std::vector<std::string> growth;  // each run's error growth line, printed under the table
  for (const std::string& suite : opt.suites)
    for (const bool isolated : {true, false}) {
      std::vector<std::string> args{tool, "qualify", "--suite", suite, "--kernel", kernel, "--quiet", "--json",
                                    json.string()};
      if (!isolated) args.push_back("--no-isolation");
      const double cpu0 = children_cpu();
      const auto t0 = std::chrono::steady_clock::now();
      const int code = run_quietly(args);
      const double wall = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
      const double cpu = children_cpu() - cpu0;
      if (code != 0 && code != 1) {
        std::printf("| %s | %s | — | — | — | %.1f | %.1f | exit %d |\n", suite.c_str(), isolated ? "on" : "off", wall, cpu,
                    code);
        std::fflush(stdout);
        continue;
      }
      const headroom::RunRecord r = headroom::read_run_record(json);
      std::int64_t longest = 0;
      std::size_t long_cases = 0, certified = 0;
      for (const auto& c : r.cases) {
        longest = std::max(longest, c.kv_len);
        if (c.kv_len >= 4096) ++long_cases, certified += c.reference_certified ? 1 : 0;
      }
      std::printf("| %s | %s | %zu (%zu) | %lld | %zu (%zu) | %.1f | %.1f | %s |\n", suite.c_str(), isolated ? "on" : "off",
                  r.cases.size(), r.skipped.size(), static_cast<long long>(longest), long_cases, certified, wall, cpu,
                  r.verdict_line().c_str());
      std::fflush(stdout);
      for (const auto& line : headroom::growth_lines(headroom::error_growth(r.cases)))
        growth.push_back(suite + (isolated ? "" : " --no-isolation") + ": " + line);
    }
  if (!growth.empty()) std::printf("\n");
  for (const auto& line : growth) std::printf("%s\n", line.c_str());
  std::error_code ec;
  fs::remove(json, ec);
  fs::remove(json.string() + ".journal", ec);
}

}  // namespace bench
