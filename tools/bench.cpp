// headroom bench — the certified reference against a plain float64 attention, side by side.
//
//   bench [--small] [--sizes T:D,...] [--q-rows Q] [--naive-rows R] [--reps N] [--threads N] [--no-naive]
//
// For each size (core problem, one batch, one head, Tq = Tk = T, Dk = Dv = D,
// float32-valued Gaussian inputs, scale 1/sqrt(D)) it times, in one run:
//   plain   a straightforward float64 attention (max shift, exp, sum, divide;
//           the textbook loops, compiled with the project's flags)
//   fast    reference_core with the default method (double-double fast path,
//           escalating to MPFR only where a bound misses the target)
//   naive   reference_core with method multiprecision (every row on MPFR, the
//           phase-1 path); timed on the first R query rows and scaled by T/R
//           (rows of an unmasked problem cost the same), and said so
// Plain and fast take the best of --reps runs (default 3), naive one run.
// It prints times, ratios, the peak resident memory of each (every
// measurement runs in its own child process, so its peak is its own), and
// the worst bound/magnitude with the certified flag. Default sizes: T in
// {256, 1024, 4096} × D in {64, 128}; --small: T in {64, 256}, D = 64.
// --q-rows Q keeps Tk = T but takes only Q query rows (long-key memory checks).
#include <sys/resource.h>
#include <sys/wait.h>
#include <unistd.h>

#include <algorithm>
#include <chrono>
#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <cstring>
#include <ctime>
#include <random>
#include <string>
#include <vector>

#include "headroom/reference.h"

namespace {

using headroom::CoreInputs;
using headroom::CoreProblem;
using headroom::Tensor;

struct Problem {
  CoreProblem p;
  CoreInputs in;
};

Problem make_problem(std::int64_t tq, std::int64_t t, std::int64_t d, std::uint64_t seed) {
  Problem pr;
  pr.p.shape = {1, 1, 1, tq, t, d, d};
  pr.p.scale = static_cast<float>(1.0 / std::sqrt(static_cast<double>(d)));
  std::mt19937_64 rng(seed);
  std::normal_distribution<double> dist(0.0, 1.0);
  auto fill = [&](std::vector<std::int64_t> shape) {
    Tensor x(std::move(shape));
    for (double& v : x.values) v = static_cast<float>(dist(rng));
    return x;
  };
  pr.in.k = fill({1, 1, t, d});
  pr.in.v = fill({1, 1, t, d});
  pr.in.q = fill({1, 1, tq, d});
  return pr;
}

// The plain float64 attention of one head: the textbook loops.
void plain_attention(const Problem& pr, std::vector<double>& out) {
  const auto& s = pr.p.shape;
  const std::int64_t tq = s.q_len, tk = s.kv_len, dk = s.key_dim, dv = s.value_dim;
  const double* q = pr.in.q.values.data();
  const double* k = pr.in.k.values.data();
  const double* v = pr.in.v.values.data();
  out.assign(static_cast<std::size_t>(tq * dv), 0.0);
  std::vector<double> z(static_cast<std::size_t>(tk));
  for (std::int64_t i = 0; i < tq; ++i) {
    double m = -INFINITY;
    for (std::int64_t j = 0; j < tk; ++j) {
      double acc = 0;
      for (std::int64_t c = 0; c < dk; ++c) acc += q[i * dk + c] * k[j * dk + c];
      z[static_cast<std::size_t>(j)] = pr.p.scale * acc;
      m = std::max(m, z[static_cast<std::size_t>(j)]);
    }
    double sum = 0;
    double* o = &out[static_cast<std::size_t>(i * dv)];
    for (std::int64_t j = 0; j < tk; ++j) {
      const double w = std::exp(z[static_cast<std::size_t>(j)] - m);
      sum += w;
      for (std::int64_t c = 0; c < dv; ++c) o[c] += w * v[j * dv + c];
    }
    for (std::int64_t c = 0; c < dv; ++c) o[c] /= sum;
  }
}

struct Measure {
  double seconds = 0;
  double peak_mib = 0;
  double worst = 0;  // bound / magnitude
  int certified = 1;
  long long escalated = 0;
  bool ok = false;
};

double peak_mib_of(const rusage& ru) { return static_cast<double>(ru.ru_maxrss) / 1024.0; }  // Linux: KiB

// Runs `job` in a child process; the child reports its time, its own peak
// memory and its figures through a pipe.
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
    m.peak_mib = peak_mib_of(ru);
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

// The clock: CPU time of this process with one thread (what the work costs,
// little disturbed by other processes on a shared machine), wall time with
// more (CPU time would add up the threads).
bool g_cpu_clock = true;
double now() {
  if (g_cpu_clock) {
    timespec ts{};
    clock_gettime(CLOCK_PROCESS_CPUTIME_ID, &ts);
    return static_cast<double>(ts.tv_sec) + 1e-9 * static_cast<double>(ts.tv_nsec);
  }
  return std::chrono::duration<double>(std::chrono::steady_clock::now().time_since_epoch()).count();
}

// The best of `reps` runs (the machine may be shared; the minimum is the
// least disturbed figure — common practice for wall-clock benchmarks).
Measure run_reference(const Problem& pr, headroom::ReferenceMethod method, unsigned threads, int reps) {
  headroom::ReferenceOptions opt;
  opt.method = method;
  opt.threads = threads;
  Measure m;
  m.seconds = INFINITY;
  headroom::CoreReference r;
  for (int rep = 0; rep < reps; ++rep) {
    const double t0 = now();
    r = headroom::reference_core(pr.p, pr.in, opt);
    m.seconds = std::min(m.seconds, now() - t0);
  }
  m.certified = r.certified ? 1 : 0;
  m.escalated = static_cast<long long>(r.stats.escalated_elements);
  for (std::size_t e = 0; e < r.bound.values.size(); ++e)
    m.worst = std::max(m.worst, r.bound.values[e] / r.magnitude.values[e]);
  return m;
}

}  // namespace

int main(int argc, char** argv) {
  std::vector<std::pair<std::int64_t, std::int64_t>> sizes;
  for (std::int64_t t : {256, 1024, 4096})
    for (std::int64_t d : {64, 128}) sizes.push_back({t, d});
  std::int64_t naive_rows = 8, q_rows = 0;
  unsigned threads = 1;
  bool naive = true;
  int reps = 3;
  for (int a = 1; a < argc; ++a) {
    const std::string arg = argv[a];
    if (arg == "--small") {
      sizes = {{64, 64}, {256, 64}};
    } else if (arg == "--sizes" && a + 1 < argc) {
      sizes.clear();
      std::string list = argv[++a];
      for (std::size_t at = 0; at < list.size();) {
        const std::size_t comma = std::min(list.find(',', at), list.size());
        const std::string item = list.substr(at, comma - at);
        const std::size_t colon = item.find(':');
        if (colon == std::string::npos) {
          std::fprintf(stderr, "bench: --sizes wants T:D[,T:D...], got \"%s\"\n", item.c_str());
          return 2;
        }
        sizes.push_back({std::atoll(item.substr(0, colon).c_str()), std::atoll(item.substr(colon + 1).c_str())});
        at = comma + 1;
      }
    } else if (arg == "--q-rows" && a + 1 < argc) {
      q_rows = std::max<std::int64_t>(1, std::atoll(argv[++a]));
    } else if (arg == "--naive-rows" && a + 1 < argc) {
      naive_rows = std::max<std::int64_t>(1, std::atoll(argv[++a]));
    } else if (arg == "--threads" && a + 1 < argc) {
      threads = static_cast<unsigned>(std::atoi(argv[++a]));
    } else if (arg == "--reps" && a + 1 < argc) {
      reps = std::max(1, std::atoi(argv[++a]));
    } else if (arg == "--no-naive") {
      naive = false;
    } else {
      std::fprintf(stderr, "usage: bench [--small] [--sizes T:D,...] [--q-rows Q] [--naive-rows R] [--reps N] [--threads N] [--no-naive]\n");
      return 2;
    }
  }
  g_cpu_clock = threads == 1;
  std::printf("core attention, 1 head, Tq = Tk = T, Dk = Dv = D, float32-valued N(0,1) inputs, %u thread(s), %s\n",
              threads, g_cpu_clock ? "CPU seconds of the measuring process" : "wall seconds");
  std::printf("plain and fast: best of %d runs; ", reps);
  std::printf("naive = all-MPFR reference (method multiprecision) timed on the first %lld query rows, scaled by T/rows\n",
              static_cast<long long>(naive_rows));
  if (q_rows > 0) std::printf("only the first %lld query rows (Tq = min(Q, T))\n", static_cast<long long>(q_rows));
  std::printf("%6s %4s | %10s %10s %12s | %10s %10s | %8s %8s %8s | %10s %5s %9s\n", "T", "D", "plain s", "fast s",
              "naive s", "fast/plain", "naive/fast", "MiB pl", "MiB fast", "MiB nv", "worst b/m", "cert", "escalated");
  for (const auto& [t, d] : sizes) {
    const std::int64_t tq = q_rows > 0 ? std::min(q_rows, t) : t;
    const Problem pr = make_problem(tq, t, d, 42);
    const Measure plain = in_child([&] {
      std::vector<double> out;
      Measure m;
      m.seconds = INFINITY;
      for (int rep = 0; rep < reps; ++rep) {
        const double t0 = now();
        plain_attention(pr, out);
        m.seconds = std::min(m.seconds, now() - t0);
      }
      return m;
    });
    const Measure fast = in_child([&] { return run_reference(pr, headroom::ReferenceMethod::fast, threads, reps); });
    Measure slow;
    double naive_s = NAN;
    if (naive) {
      const std::int64_t rows = std::min(naive_rows, tq);
      Problem sub = pr;
      sub.p.shape.q_len = rows;
      sub.in.q.shape[2] = rows;
      sub.in.q.values.resize(static_cast<std::size_t>(rows * d));
      slow = in_child([&] { return run_reference(sub, headroom::ReferenceMethod::multiprecision, threads, 1); });
      naive_s = slow.seconds * static_cast<double>(tq) / static_cast<double>(rows);
    }
    std::printf("%6lld %4lld | %10.4f %10.4f %12.3f | %10.2f %10.1f | %8.1f %8.1f %8.1f | %10.3g %5s %9lld\n",
                static_cast<long long>(t), static_cast<long long>(d), plain.seconds, fast.seconds, naive_s,
                fast.seconds / plain.seconds, naive_s / fast.seconds, plain.peak_mib, fast.peak_mib,
                naive ? slow.peak_mib : NAN, fast.worst, fast.certified && (!naive || slow.certified) ? "yes" : "NO",
                fast.escalated);
    std::fflush(stdout);
  }
  return 0;
}
