// headroom bench — measuring one job: its time, its own peak memory (in a child process).
#pragma once

#include <sys/resource.h>
#include <sys/wait.h>
#include <unistd.h>

#include <algorithm>
#include <chrono>
#include <cmath>
#include <cstdio>
#include <ctime>
#include <utility>

namespace bench {

struct Measure {
  double seconds = 0;
  double peak_mib = 0;
  double worst = 0;  // bound / magnitude
  int certified = 1;
  long long escalated = 0;
  bool ok = false;
};

/// The clock: CPU time of this process with one thread (what the work costs,
/// little disturbed by other processes on a shared machine), wall time with
/// more (CPU time would add up the threads).
inline bool& cpu_clock() {
  static bool on = true;
  return on;
}
inline double now() {
  if (cpu_clock()) {
    timespec ts{};
    clock_gettime(CLOCK_PROCESS_CPUTIME_ID, &ts);
    return static_cast<double>(ts.tv_sec) + 1e-9 * static_cast<double>(ts.tv_nsec);
  }
  return std::chrono::duration<double>(std::chrono::steady_clock::now().time_since_epoch()).count();
}

/// Returns: the best of `reps` timings of fn() (the machine may be shared; the
/// minimum is the least disturbed figure — common practice for benchmarks).
template <class Fn>
double best_of(int reps, Fn&& fn) {
  double best = INFINITY;
  for (int rep = 0; rep < reps; ++rep) {
    const double t0 = now();
    fn();
    best = std::min(best, now() - t0);
  }
  return best;
}

/// Runs `job` in a child process; the child reports its Measure and its own
/// peak memory through a pipe, so each figure is that job's alone.
template <class Job>
Measure in_child(Job job) {
  int fd[2];
  if (pipe(fd) != 0) return {};
  std::fflush(stdout);
  const pid_t pid = fork();
  if (pid == 0) {
    close(fd[0]);
    Measure m = job();
    rusage ru{};
    getrusage(RUSAGE_SELF, &ru);
    m.peak_mib = static_cast<double>(ru.ru_maxrss) / 1024.0;  // Linux: KiB
    m.ok = true;
    if (write(fd[1], &m, sizeof m) != static_cast<ssize_t>(sizeof m)) _exit(3);
    _exit(0);
  }
  close(fd[1]);
  Measure m;
  const ssize_t got = read(fd[0], &m, sizeof m);
  close(fd[0]);
  int status = 0;
  waitpid(pid, &status, 0);
  if (got != static_cast<ssize_t>(sizeof m)) m.ok = false;
  return m;
}

/// Runs the jobs a(round) and b(round), each in its own child (in_child), in
/// turn for `rounds` rounds (a, b, a, b, …), keeping per job the best seconds
/// and the largest peak memory, and its round-0 Measure for the other figures.
/// A slow phase of a shared machine then falls on both jobs, not on one: the
/// ratio of two best-of figures taken one after the other can be off by 1.5×
/// (tools/bench on the 2-core machine: plain backward best-of-7 0.147 to 0.225 s).
template <class A, class B>
void interleaved(int rounds, A a, B b, Measure& ma, Measure& mb) {
  for (int round = 0; round < rounds; ++round) {
    const Measure ra = in_child([&] { return a(round); });
    const Measure rb = in_child([&] { return b(round); });
    if (round == 0) {
      ma = ra;
      mb = rb;
      continue;
    }
    for (auto [m, r] : {std::pair<Measure*, const Measure*>{&ma, &ra}, {&mb, &rb}}) {
      m->seconds = std::min(m->seconds, r->seconds);
      m->peak_mib = std::max(m->peak_mib, r->peak_mib);
      m->ok = m->ok && r->ok;
    }
  }
}

}  // namespace bench
