// headroom — the certified backward reference checked against mpmath and NumPy.
//
// Outside references, run as /usr/bin/python3 (Debian python3-mpmath,
// python3-numpy) on inputs written as hex floats (float.fromhex is exact):
//  - mpmath (mpmath.org) at mp.dps = 50 on small cases, the gradients by the
//    textbook formulas (Dao et al. 2022, Alg. 4: P = softmax(S), dV = PᵀdO,
//    dP = dO Vᵀ, D_i = Σ_j P_ij dP_ij, dS = P∘(dP − D), dQ = s·dS K,
//    dK = s·dSᵀ Q, grouped heads summed). Each element must satisfy
//      |ref − mpmath| ≤ bound + 2^-53|ref| + 10^-40·magnitude
//    (reference_backward.h's contract; 10^-40 covers mpmath's own error at 50
//    digits on these few dozen operations). Compared in MPFR at 400 bits.
//  - float64 on larger cases (Tk up to 96, GQA, masks): the same formulas in
//    Python floats with NumPy's exp (IEEE binary64 throughout), whose error is a few hundred ulps of the magnitude
//    at most; each element must agree within 2^-40·magnitude — a check that
//    the reference is right at scale, not a check of its 2^-80 bound.
// Without /usr/bin/python3, mpmath or NumPy the test fails and says so.
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

#include "../reference_support.h"
#include "headroom/reference_backward.h"

namespace headroom {
namespace {

namespace fs = std::filesystem;
constexpr const char* kPython = "/usr/bin/python3";

// Reads cases; writes per case the dQ, dK, dV elements in order, one per line.
constexpr const char* kScript = R"PY(
import sys
mode = sys.argv[3]
if mode == "mpmath":
    from mpmath import mp, mpf, exp, log
    mp.dps = 50
    num = lambda t: mpf(float.fromhex(t))
    fmt = lambda x: mp.nstr(x, 45, min_fixed=1, max_fixed=0)
    ex, lg = exp, log
else:
    import numpy as np
    num = lambda t: float.fromhex(t)
    fmt = lambda x: float(x).hex()
    ex, lg = np.exp, np.log
lines = open(sys.argv[1]).read().splitlines()
out = []
i = 0
while i < len(lines):
    B, Hq, Hkv, Tq, Tk, Dk, Dv = map(int, lines[i].split()[1:8]); s = num(lines[i].split()[8])
    q, k, v, do, bias = ([num(t) for t in lines[i + n].split()[1:]] for n in range(1, 6))
    mask = [int(t) for t in lines[i + 6].split()[1:]]
    i += 7
    G = Hq // Hkv
    Q = lambda b, h, r, c: q[((b*Hq + h)*Tq + r)*Dk + c]
    K = lambda b, g, j, c: k[((b*Hkv + g)*Tk + j)*Dk + c]
    V = lambda b, g, j, c: v[((b*Hkv + g)*Tk + j)*Dv + c]
    dO = lambda b, h, r, c: do[((b*Hq + h)*Tq + r)*Dv + c]
    dq = [[[[0]*Dk for _ in range(Tq)] for _ in range(Hq)] for _ in range(B)]
    dk = [[[[0]*Dk for _ in range(Tk)] for _ in range(Hkv)] for _ in range(B)]
    dv = [[[[0]*Dv for _ in range(Tk)] for _ in range(Hkv)] for _ in range(B)]
    for b in range(B):
        for h in range(Hq):
            g = h // G
            for r in range(Tq):
                at = ((b*Hq + h)*Tq + r)*Tk
                keys = [j for j in range(Tk) if mask[at + j]]
                if not keys: continue
                z = [s * sum(Q(b, h, r, c) * K(b, g, j, c) for c in range(Dk)) + bias[at + j] for j in keys]
                m = max(z)
                w = [ex(x - m) for x in z]
                S = sum(w)
                P = [x / S for x in w]
                dP = [sum(dO(b, h, r, c) * V(b, g, j, c) for c in range(Dv)) for j in keys]
                D = sum(P[a] * dP[a] for a in range(len(keys)))
                dS = [P[a] * (dP[a] - D) for a in range(len(keys))]
                for a, j in enumerate(keys):
                    for c in range(Dk):
                        dq[b][h][r][c] += s * dS[a] * K(b, g, j, c)
                        dk[b][g][j][c] += s * dS[a] * Q(b, h, r, c)
                    for c in range(Dv):
                        dv[b][g][j][c] += P[a] * dO(b, h, r, c)
    for t in (dq, dk, dv):
        for x in t:
            for y in x:
                for zz in y:
                    out.extend(fmt(e) for e in zz)
open(sys.argv[2], "w").write("\n".join(out) + "\n")
)PY";

std::string hex(double x) {
  char buf[64];
  std::snprintf(buf, sizeof buf, "%a", x);
  return buf;
}

struct TextCase {
  testing::CoreCase c;
  Tensor d_o;
  std::vector<double> allowed, bias;  // [B, Hq, Tq, Tk]
};

void write_case(std::ostream& os, const TextCase& t) {
  const CoreShape& s = t.c.problem.shape;
  os << "case " << s.batch << ' ' << s.q_heads << ' ' << s.kv_heads << ' ' << s.q_len << ' ' << s.kv_len << ' '
     << s.key_dim << ' ' << s.value_dim << ' ' << hex(t.c.problem.scale) << '\n';
  for (const Tensor* x : {&t.c.inputs.q, &t.c.inputs.k, &t.c.inputs.v, &t.d_o}) {
    os << 't';
    for (double e : x->values) os << ' ' << hex(e);
    os << '\n';
  }
  os << 'b';
  for (double e : t.bias) os << ' ' << hex(e);
  os << "\nm";
  for (double e : t.allowed) os << ' ' << (e != 0 ? 1 : 0);
  os << '\n';
}

// Masks by index: none, causal, a per-head bias with masked entries (so the
// python side sees the same visibility and bias the reference does).
TextCase make_case(const CoreShape& s, int index, double sigma) {
  TextCase t{testing::random_core(s, 500 + static_cast<std::uint64_t>(index), sigma), {}, {}, {}};
  std::mt19937_64 rng(900 + static_cast<std::uint64_t>(index));
  t.d_o = testing::gaussian({s.batch, s.q_heads, s.q_len, s.value_dim}, rng, index % 4 == 3 ? 100.0 : 1.0);
  const auto n = static_cast<std::size_t>(s.batch * s.q_heads * s.q_len * s.kv_len);
  t.allowed.assign(n, 1.0);
  t.bias.assign(n, 0.0);
  Mask& m = t.c.problem.mask;
  if (index % 3 == 1) {
    m.kind = MaskKind::causal_bottom_right;
  } else if (index % 3 == 2) {
    m.kind = MaskKind::bias;
    m.bias = Tensor({s.batch, s.q_heads, s.q_len, s.kv_len});
    std::normal_distribution<double> b(0.0, 2.0);
    std::bernoulli_distribution coin(0.25);
    for (std::size_t e = 0; e < n; ++e) {
      t.bias[e] = static_cast<float>(b(rng));
      m.bias.values[e] = coin(rng) ? -INFINITY : t.bias[e];
    }
  }
  for (std::int64_t b = 0; b < s.batch; ++b)
    for (std::int64_t h = 0; h < s.q_heads; ++h)
      for (std::int64_t i = 0; i < s.q_len; ++i)
        for (std::int64_t j = 0; j < s.kv_len; ++j) {
          const auto at = static_cast<std::size_t>(((b * s.q_heads + h) * s.q_len + i) * s.kv_len + j);
          t.allowed[at] = m.visible(s, b, h, i, j) ? 1.0 : 0.0;
          if (t.allowed[at] == 0) t.bias[at] = 0;
        }
  return t;
}

// Runs the script on the cases; returns its lines.
std::vector<std::string> run_python(const std::vector<TextCase>& cases, const char* mode) {
  EXPECT_EQ(access(kPython, X_OK), 0) << kPython << " not found: install python3, python3-mpmath, python3-numpy";
  const fs::path dir = fs::temp_directory_path() / ("headroom-backward-" + std::string(mode) + "-" +
                                                    std::to_string(::getpid()));
  fs::create_directories(dir);
  {
    std::ofstream os(dir / "cases.txt");
    for (const TextCase& t : cases) write_case(os, t);
    std::ofstream(dir / "backward.py") << kScript;
  }
  const std::string cmd = std::string(kPython) + " '" + (dir / "backward.py").string() + "' '" +
                          (dir / "cases.txt").string() + "' '" + (dir / "out.txt").string() + "' " + mode + " 2> '" +
                          (dir / "err.txt").string() + "'";
  const int rc = std::system(cmd.c_str());
  std::stringstream err;
  err << std::ifstream(dir / "err.txt").rdbuf();
  EXPECT_EQ(rc, 0) << "python script failed (" << mode << "): " << err.str();
  std::vector<std::string> lines;
  std::ifstream in(dir / "out.txt");
  for (std::string line; std::getline(in, line);) lines.push_back(line);
  fs::remove_all(dir);
  return lines;
}

TEST(ReferenceBackwardVsMpmath, EveryGradientElementWithinItsBound) {
  std::vector<TextCase> cases;
  for (int c = 0; c < 12; ++c) {
    CoreShape s{1 + c % 2, 2, c % 2 == 0 ? 1 : 2, 1 + c % 3, 2 + (c * 5) % 6, 1 + c % 4, 1 + (c * 7) % 3};
    cases.push_back(make_case(s, c, c % 4 == 2 ? 4.0 : 1.0));
  }
  const std::vector<std::string> lines = run_python(cases, "mpmath");
  mpfr_t want, got, diff, allow, tmp;
  mpfr_inits2(400, want, got, diff, allow, tmp, static_cast<mpfr_ptr>(nullptr));
  std::size_t line = 0;
  double worst = 0;
  for (std::size_t c = 0; c < cases.size(); ++c) {
    const BackwardReference r = reference_backward(cases[c].c.problem, cases[c].c.inputs, cases[c].d_o);
    EXPECT_TRUE(r.certified) << "case " << c;
    for (const GradientReference* g : {&r.d_q, &r.d_k, &r.d_v}) {
      for (std::size_t e = 0; e < g->out.values.size(); ++e, ++line) {
        ASSERT_LT(line, lines.size()) << "mpmath output ends early";
        const double out = g->out.values[e];
        mpfr_set_str(want, lines[line].c_str(), 10, MPFR_RNDN);
        mpfr_set_d(got, out, MPFR_RNDN);
        mpfr_sub(diff, got, want, MPFR_RNDN);
        mpfr_abs(diff, diff, MPFR_RNDN);
        mpfr_set_d(allow, g->bound.values[e] + 0x1p-53 * std::fabs(out), MPFR_RNDU);
        mpfr_set_d(tmp, g->magnitude.values[e], MPFR_RNDN);
        mpfr_mul_d(tmp, tmp, 1e-40, MPFR_RNDU);
        mpfr_add(allow, allow, tmp, MPFR_RNDU);
        EXPECT_LE(mpfr_cmp(diff, allow), 0) << "case " << c << " element " << e << " ref " << hex(out) << " mpmath "
                                            << lines[line] << " bound " << hex(g->bound.values[e]);
        if (mpfr_zero_p(allow) == 0) {
          mpfr_div(diff, diff, allow, MPFR_RNDN);
          worst = std::max(worst, mpfr_get_d(diff, MPFR_RNDN));
        }
      }
    }
  }
  mpfr_clears(want, got, diff, allow, tmp, static_cast<mpfr_ptr>(nullptr));
  EXPECT_EQ(line, lines.size());
  std::printf("backward reference vs mpmath: %zu elements, worst |ref - mpmath| / allowance = %.3g\n", line, worst);
  EXPECT_GT(line, 200u);
}

TEST(ReferenceBackwardVsNumpy, LargerCasesAgreeWithAFloat64Gradient) {
  std::vector<TextCase> cases;
  for (int c = 0; c < 3; ++c) {
    CoreShape s{1, 4, c == 0 ? 4 : 2, 24 + 8 * c, 48 + 24 * c, 16, 8};
    cases.push_back(make_case(s, c + 1, 1.0));
  }
  const std::vector<std::string> lines = run_python(cases, "numpy");
  std::size_t line = 0;
  double worst = 0;
  for (std::size_t c = 0; c < cases.size(); ++c) {
    const BackwardReference r = reference_backward(cases[c].c.problem, cases[c].c.inputs, cases[c].d_o);
    EXPECT_TRUE(r.certified) << "case " << c;
    for (const GradientReference* g : {&r.d_q, &r.d_k, &r.d_v}) {
      for (std::size_t e = 0; e < g->out.values.size(); ++e, ++line) {
        ASSERT_LT(line, lines.size()) << "numpy output ends early";
        const double np = std::strtod(lines[line].c_str(), nullptr);
        const double diff = std::fabs(g->out.values[e] - np), allow = 0x1p-40 * g->magnitude.values[e];
        EXPECT_LE(diff, allow) << "case " << c << " element " << e;
        if (allow > 0) worst = std::max(worst, diff / g->magnitude.values[e]);
      }
    }
  }
  EXPECT_EQ(line, lines.size());
  std::printf("backward reference vs numpy float64: %zu elements, worst |ref - numpy| / magnitude = %.3g\n", line,
              worst);
  EXPECT_GT(line, 5000u);
}

}  // namespace
}  // namespace headroom
