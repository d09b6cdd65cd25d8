// headroom — the certified block reference checked against a NumPy float64 multi-head attention.
//
// The outside reference is NumPy (numpy.org; Debian python3-numpy) run as
// /usr/bin/python3: Q = X_q W_q + b_q, K, V likewise, per head
// softmax(s·Q_h K_gᵀ + mask) V_g with g = h // (Hq/Hkv), concatenation and
// Y = O W_o + b_o, all in float64 (Vaswani et al. 2017, §3.2.2). Inputs travel
// as hex floats, so NumPy receives exactly our doubles. float64 agrees with
// the exact result to about 1e-15 relative on these small, well-scaled cases,
// so the check per element is |ours − numpy| ≤ 1e-12 · magnitude, with
// magnitude = Σ_c |concat_c||W_o[c,m]| + |b_o[m]| (reference.h) — relative
// to the scale of the dot product, as an element near zero by cancellation
// has no meaningful relative error. Without numpy the test fails and says so.
#include <gtest/gtest.h>
#include <unistd.h>

#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <sstream>
#include <string>

#include "headroom/reference.h"
#include "../reference_support.h"

namespace headroom {
namespace {

namespace fs = std::filesystem;
constexpr const char* kPython = "/usr/bin/python3";

constexpr const char* kScript = R"PY(
import sys
import numpy as np
def arr(line):
    return np.array([float.fromhex(t) for t in line.split()[1:]], dtype=np.float64)
lines = open(sys.argv[1]).read().splitlines()
res = []
i = 0
while i < len(lines):
    B, Tq, Tk, Dm, Hq, Hkv, Dk, Dv, causal = map(int, lines[i].split()[1:10])
    s = float.fromhex(lines[i].split()[10])
    xq = arr(lines[i+1]).reshape(B, Tq, Dm); xkv = arr(lines[i+2]).reshape(B, Tk, Dm)
    wq = arr(lines[i+3]).reshape(Dm, Hq*Dk); wk = arr(lines[i+4]).reshape(Dm, Hkv*Dk)
    wv = arr(lines[i+5]).reshape(Dm, Hkv*Dv); wo = arr(lines[i+6]).reshape(Hq*Dv, Dm)
    bq, bk, bv, bo = (arr(lines[i+7+t]) for t in range(4))
    i += 11
    q = xq @ wq + (bq if bq.size else 0.0)
    k = xkv @ wk + (bk if bk.size else 0.0)
    v = xkv @ wv + (bv if bv.size else 0.0)
    o = np.zeros((B, Tq, Hq*Dv))
    for h in range(Hq):
        g = h // (Hq // Hkv)
        z = s * (q[:, :, h*Dk:(h+1)*Dk] @ k[:, :, g*Dk:(g+1)*Dk].transpose(0, 2, 1))
        if causal:  # bottom-right aligned: key j visible to query i when j <= i + Tk - Tq
            allowed = np.arange(Tk)[None, :] <= np.arange(Tq)[:, None] + (Tk - Tq)
            z = np.where(allowed[None], z, -np.inf)
        z = z - z.max(axis=-1, keepdims=True)
        p = np.exp(z); p /= p.sum(axis=-1, keepdims=True)
        o[:, :, h*Dv:(h+1)*Dv] = p @ v[:, :, g*Dv:(g+1)*Dv]
    y = o @ wo + (bo if bo.size else 0.0)
    res.append(" ".join(float.hex(float(x)) for x in y.ravel()))
open(sys.argv[2], "w").write("\n".join(res) + "\n")
)PY";

std::string hex(double x) {
  char buf[64];
  std::snprintf(buf, sizeof buf, "%a", x);
  return buf;
}

void write_tensor(std::ostream& os, const Tensor& t) {
  os << 't';
  for (double x : t.values) os << ' ' << hex(x);
  os << '\n';
}

testing::BlockCase make_case(int index) {
  BlockShape s;
  s.batch = 1 + index % 2;
  s.q_heads = index % 3 == 0 ? 4 : 2;
  s.kv_heads = index % 2 == 0 ? s.q_heads : 1;
  s.q_len = 2 + index % 4;
  s.kv_len = 3 + (index * 5) % 6;
  s.key_dim = 2 + index % 3;
  s.value_dim = 1 + (index * 2) % 4;
  s.model_dim = 4 + (index * 3) % 9;
  auto c = testing::random_block(s, 500 + static_cast<std::uint64_t>(index), index % 3 != 1);
  if (index % 2 == 1) c.problem.mask.kind = MaskKind::causal_bottom_right;
  return c;
}

TEST(ReferenceVsNumpy, BlockAgreesWithFloat64MultiHeadAttention) {
  ASSERT_EQ(access(kPython, X_OK), 0) << kPython << " not found: this check needs NumPy (install python3-numpy)";
  ASSERT_EQ(std::system((std::string(kPython) + " -c 'import numpy' > /dev/null 2>&1").c_str()), 0)
      << kPython << " cannot import numpy: install the Debian package python3-numpy";
  const fs::path dir = fs::temp_directory_path() / ("headroom-numpy-block-" + std::to_string(::getpid()));
  fs::create_directories(dir);
  constexpr int kCases = 12;
  std::vector<testing::BlockCase> cases;
  {
    std::ofstream os(dir / "cases.txt");
    for (int c = 0; c < kCases; ++c) {
      cases.push_back(make_case(c));
      const BlockShape& s = cases.back().problem.shape;
      const BlockInputs& in = cases.back().inputs;
      os << "case " << s.batch << ' ' << s.q_len << ' ' << s.kv_len << ' ' << s.model_dim << ' ' << s.q_heads << ' '
         << s.kv_heads << ' ' << s.key_dim << ' ' << s.value_dim << ' '
         << (cases.back().problem.mask.kind == MaskKind::causal_bottom_right ? 1 : 0) << ' '
         << hex(cases.back().problem.scale) << '\n';
      for (const Tensor* t : {&in.x_q, &in.x_kv, &in.w_q, &in.w_k, &in.w_v, &in.w_o, &in.b_q, &in.b_k, &in.b_v, &in.b_o})
        write_tensor(os, *t);
    }
    std::ofstream(dir / "block.py") << kScript;
  }
  const std::string cmd = std::string(kPython) + " '" + (dir / "block.py").string() + "' '" +
                          (dir / "cases.txt").string() + "' '" + (dir / "numpy.txt").string() + "' 2> '" +
                          (dir / "err.txt").string() + "'";
  const int rc = std::system(cmd.c_str());
  std::stringstream err;
  err << std::ifstream(dir / "err.txt").rdbuf();
  ASSERT_EQ(rc, 0) << "numpy script failed: " << err.str();

  std::ifstream results(dir / "numpy.txt");
  double worst = 0;
  int masked = 0;
  for (int c = 0; c < kCases; ++c) {
    const BlockReference r = reference_block(cases[c].problem, cases[c].inputs);
    EXPECT_TRUE(r.certified) << "case " << c;
    std::string line;
    ASSERT_TRUE(std::getline(results, line)) << "numpy output ends early at case " << c;
    std::istringstream fields(line);
    for (std::size_t e = 0; e < r.out.values.size(); ++e) {
      std::string text;
      fields >> text;
      const double np = std::strtod(text.c_str(), nullptr);
      if (std::isnan(np)) {  // a query row with no visible key (bottom-right causal, Tq > Tk)
        EXPECT_TRUE(std::isnan(r.out.values[e])) << "case " << c << " element " << e;
        ++masked;
        continue;
      }
      const double rel = std::fabs(r.out.values[e] - np) / r.magnitude.values[e];
      worst = std::max(worst, rel);
      EXPECT_LE(rel, 1e-12) << "FAIL case=" << c << " element=" << e << " ref=" << hex(r.out.values[e])
                            << " numpy=" << text << " magnitude=" << r.magnitude.values[e];
    }
  }
  std::printf("block reference vs numpy float64: worst |ref - numpy| / magnitude = %.3g (allowed 1e-12); %d elements of fully masked rows NaN in both\n", worst, masked);
  fs::remove_all(dir);
}

}  // namespace
}  // namespace headroom
