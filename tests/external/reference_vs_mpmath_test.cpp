// headroom — the certified core reference checked against mpmath at 50 digits.
//
// The outside reference is mpmath (mpmath.org; Debian python3-mpmath) run as
// /usr/bin/python3 with mp.dps = 50: softmax attention computed in the plain
// textbook way (max shift, exp, sum, divide) on inputs written as hex floats,
// so mpmath receives exactly the doubles we do (float.fromhex is exact). At
// 50 digits mpmath's own error on these small cases is far below 10^-40
// relative to Σ_j p_j|v_j| (a few dozen operations, each with relative error
// ~10^-50); we allow 10^-40·magnitude for it. The check per element:
//   |out − mpmath| ≤ bound + 2^-53|out| + 10^-40·magnitude,
// i.e. the contract of reference.h. The comparison itself is done in MPFR at
// 400 bits on mpmath's decimal string, so it adds no error of its own.
// Soft caps and sink logits (kernel_abi.h version 2) reach mpmath too: the
// script caps with mpmath's own tanh (c·tanh(x/c), before the bias) and adds
// exp(σ) to the normaliser, so the certified tanh enclosure of mp_row.h (1')
// and the sink term (1'') are checked against an independent implementation.
// Without /usr/bin/python3 or mpmath the test fails and says so.
#include <gtest/gtest.h>
#include <mpfr.h>
#include <unistd.h>

#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <random>
#include <sstream>
#include <string>
#include <vector>

#include "headroom/reference.h"
#include "../reference_support.h"

namespace headroom {
namespace {

namespace fs = std::filesystem;
constexpr const char* kPython = "/usr/bin/python3";

// Reads the case file written below and prints, per row, "masked" or the Dv
// outputs and the lse, each with 45 significant digits.
constexpr const char* kScript = R"PY(
import sys
from mpmath import mp, mpf, exp, log, tanh
mp.dps = 50
def floats(line):
    return [mpf(float.fromhex(t)) for t in line.split()[1:]]
lines = open(sys.argv[1]).read().splitlines()
out = []
i = 0
while i < len(lines):
    head = lines[i].split()
    tq, tk, dk, dv = map(int, head[1:5]); s = mpf(float.fromhex(head[5]))
    cap = mpf(float.fromhex(head[6])); sink = None if head[7] == "none" else mpf(float.fromhex(head[7]))
    q = floats(lines[i+1]); k = floats(lines[i+2]); v = floats(lines[i+3])
    mask = [int(t) for t in lines[i+4].split()[1:]]
    bias = floats(lines[i+5])
    i += 6
    for r in range(tq):
        keys = [j for j in range(tk) if mask[r*tk + j]]
        if not keys:
            out.append("masked"); continue
        x = [s * sum(q[r*dk + c] * k[j*dk + c] for c in range(dk)) for j in keys]
        if cap > 0:
            x = [cap * tanh(t / cap) for t in x]
        z = [x[a] + bias[r*tk + keys[a]] for a in range(len(keys))]
        m = max(z + ([sink] if sink is not None else []))
        w = [exp(t - m) for t in z]
        S = sum(w) + (exp(sink - m) if sink is not None else 0)
        o = [sum(w[a] * v[keys[a]*dv + d] for a in range(len(keys))) / S for d in range(dv)]
        out.append(" ".join(mp.nstr(x, 45, min_fixed=1, max_fixed=0) for x in o) + " " + mp.nstr(m + log(S), 45, min_fixed=1, max_fixed=0))
open(sys.argv[2], "w").write("\n".join(out) + "\n")
)PY";

std::string hex(double x) {
  char buf[64];
  std::snprintf(buf, sizeof buf, "%a", x);
  return buf;
}

struct TextCase {
  testing::CoreCase c;
  std::vector<double> mask, bias;  // [Tq, Tk]
};

void write_case(std::ostream& os, const TextCase& t) {
  const CoreShape& s = t.c.problem.shape;
  os << "case " << s.q_len << ' ' << s.kv_len << ' ' << s.key_dim << ' ' << s.value_dim << ' '
     << hex(t.c.problem.scale) << ' ' << hex(t.c.problem.softcap) << ' '
     << (t.c.problem.has_sinks() ? hex(t.c.problem.sinks[0]) : std::string("none")) << '\n';
  for (const auto* tensor : {&t.c.inputs.q, &t.c.inputs.k, &t.c.inputs.v}) {
    os << 't';
    for (double x : tensor->values) os << ' ' << hex(x);
    os << '\n';
  }
  os << 'm';
  for (double x : t.mask) os << ' ' << (x != 0 ? 1 : 0);
  os << "\nb";
  for (double x : t.bias) os << ' ' << hex(x);
  os << '\n';
}

// A case of one head; every other one gets a dense mask with some masked keys
// and an additive bias, so masks, biases, large logits and cancelling values
// all reach mpmath.
TextCase make_case(int index) {
  std::mt19937_64 rng(1000 + static_cast<std::uint64_t>(index));
  CoreShape s;
  s.q_len = 1 + index % 4;
  s.kv_len = 1 + (index * 7) % 9;
  s.key_dim = 1 + (index * 3) % 6;
  s.value_dim = 1 + index % 3;
  const double sigma = index % 5 == 4 ? 12.0 : (index % 3 == 0 ? 0.3 : 1.5);  // 12: logits in the hundreds
  TextCase t{testing::random_core(s, 77 + static_cast<std::uint64_t>(index), sigma), {}, {}};
  if (index % 6 == 5) {
    // Cancelling values: v_j = ±(1 + tiny) pairs, so out is near zero.
    for (std::size_t j = 0; j < t.c.inputs.v.values.size(); ++j)
      t.c.inputs.v.values[j] = (j % 2 == 0 ? 1.0 : -1.0) * (1.0 + std::ldexp(static_cast<double>(j), -40));
  }
  const auto n = static_cast<std::size_t>(s.q_len * s.kv_len);
  t.mask.assign(n, 1.0);
  t.bias.assign(n, 0.0);
  if (index % 2 == 1) {
    std::uniform_int_distribution<int> coin(0, 3);
    std::normal_distribution<double> b(0.0, 2.0);
    for (std::size_t e = 0; e < n; ++e) {
      t.mask[e] = coin(rng) == 0 ? 0.0 : 1.0;
      t.bias[e] = static_cast<float>(b(rng));
    }
    t.c.problem.mask.kind = MaskKind::bias;
    t.c.problem.mask.bias = Tensor({1, 1, s.q_len, s.kv_len});
    for (std::size_t e = 0; e < n; ++e)
      t.c.problem.mask.bias.values[e] = t.mask[e] != 0 ? t.bias[e] : -INFINITY;
  }
  // Soft caps on a third of the cases (c from 0.75, below the scores, to 20),
  // sinks on every fourth, from far below the scores to far above them.
  if (index % 3 == 2) t.c.problem.softcap = index % 9 == 2 ? 0.75f : (index % 9 == 5 ? 4.0f : 20.0f);
  if (index % 4 == 1) t.c.problem.sinks = {static_cast<float>((index % 8 == 1 ? 6.5 : -3.25) * sigma)};
  return t;
}

TEST(ReferenceVsMpmath, EveryElementWithinItsBound) {
  ASSERT_EQ(access(kPython, X_OK), 0) << kPython << " not found: this check needs mpmath (install python3-mpmath)";
  ASSERT_EQ(std::system((std::string(kPython) + " -c 'import mpmath' > /dev/null 2>&1").c_str()), 0)
      << kPython << " cannot import mpmath: install the Debian package python3-mpmath";

  const fs::path dir = fs::temp_directory_path() / ("headroom-mpmath-" + std::to_string(::getpid()));
  fs::create_directories(dir);
  constexpr int kCases = 24;
  std::vector<TextCase> cases;
  {
    std::ofstream os(dir / "cases.txt");
    for (int c = 0; c < kCases; ++c) {
      cases.push_back(make_case(c));
      write_case(os, cases.back());
    }
    std::ofstream(dir / "attention.py") << kScript;
  }
  const std::string cmd = std::string(kPython) + " '" + (dir / "attention.py").string() + "' '" +
                          (dir / "cases.txt").string() + "' '" + (dir / "mpmath.txt").string() + "' 2> '" +
                          (dir / "err.txt").string() + "'";
  const int rc = std::system(cmd.c_str());
  std::stringstream err;
  err << std::ifstream(dir / "err.txt").rdbuf();
  ASSERT_EQ(rc, 0) << "mpmath script failed: " << err.str();

  std::ifstream results(dir / "mpmath.txt");
  mpfr_t want, got, diff, allow;
  mpfr_inits2(400, want, got, diff, allow, static_cast<mpfr_ptr>(nullptr));
  double worst = 0;
  int checked = 0;
  for (int c = 0; c < kCases; ++c) {
    const CoreReference r = reference_core(cases[c].c.problem, cases[c].c.inputs);
    EXPECT_TRUE(r.certified) << "case " << c;
    const CoreShape& s = cases[c].c.problem.shape;
    for (std::int64_t i = 0; i < s.q_len; ++i) {
      std::string line;
      ASSERT_TRUE(std::getline(results, line)) << "mpmath output ends early at case " << c;
      std::istringstream fields(line);
      if (line == "masked") {
        EXPECT_EQ(r.fully_masked[static_cast<std::size_t>(i)], 1) << "case " << c << " row " << i;
        continue;
      }
      for (std::int64_t d = 0; d <= s.value_dim; ++d) {
        std::string text;
        fields >> text;
        const bool is_lse = d == s.value_dim;
        const double out = is_lse ? r.lse.at(0, 0, i) : r.out.at(0, 0, i, d);
        const double bound = is_lse ? r.lse_bound.at(0, 0, i) : r.bound.at(0, 0, i, d);
        const double mag = is_lse ? 1.0 : r.magnitude.at(0, 0, i, d);
        mpfr_set_str(want, text.c_str(), 10, MPFR_RNDN);
        mpfr_set_d(got, out, MPFR_RNDN);
        mpfr_sub(diff, got, want, MPFR_RNDN);
        mpfr_abs(diff, diff, MPFR_RNDN);
        mpfr_set_d(allow, bound + 0x1p-53 * std::fabs(out), MPFR_RNDU);
        mpfr_set_d(got, mag, MPFR_RNDN);
        mpfr_mul_d(got, got, 1e-40, MPFR_RNDU);
        mpfr_add(allow, allow, got, MPFR_RNDU);
        EXPECT_LE(mpfr_cmp(diff, allow), 0)
            << "FAIL case=" << c << " row=" << i << (is_lse ? " lse" : " d=") << (is_lse ? "" : std::to_string(d))
            << " ref=" << hex(out) << " mpmath=" << text << " bound=" << hex(bound);
        mpfr_div(diff, diff, allow, MPFR_RNDN);
        worst = std::max(worst, mpfr_get_d(diff, MPFR_RNDN));
        ++checked;
      }
    }
  }
  mpfr_clears(want, got, diff, allow, static_cast<mpfr_ptr>(nullptr));
  std::printf("reference vs mpmath: %d values, worst |ref - mpmath| / allowance = %.3g\n", checked, worst);
  EXPECT_GT(checked, 50);
  int capped = 0, sunk = 0;
  for (const TextCase& t : cases) capped += t.c.problem.has_softcap(), sunk += t.c.problem.has_sinks();
  EXPECT_GE(capped, 6);
  EXPECT_GE(sunk, 5);
  fs::remove_all(dir);
}

}  // namespace
}  // namespace headroom
