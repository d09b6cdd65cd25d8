// headroom — binary16 conversions against NumPy's float16.
//
// Outside reference: NumPy's float16 casts (numpy/core/src/npymath/halffloat.c:
// npy_doublebits_to_halfbits and npy_floatbits_to_halfbits round once, to
// nearest even, straight from binary64 / binary32; npy_halfbits_to_floatbits is
// exact). Values cross the process boundary as raw bit patterns in hex, so
// nothing is lost in printing. /usr/bin/python3 with numpy is required (CI
// installs python3-numpy); without it the test fails and says so.
#include <gtest/gtest.h>

#include <unistd.h>

#include <bit>
#include <cmath>
#include <cstdint>
#include <cstdio>
#include <cstdlib>
#include <fstream>
#include <limits>
#include <cstring>
#include <string>
#include <string_view>
#include <vector>

#include "headroom/binary16.h"

namespace headroom {
namespace {

constexpr const char* kPython = "/usr/bin/python3";

// Reads hex patterns (one a line: "d" float64, "f" float32), casts them with
// NumPy, and prints the binary16 patterns; then every binary16 pattern as
// float32 bits.
constexpr const char* kScript = R"PY(
import sys, numpy as np
d, f = [], []
for line in open(sys.argv[1]):
    kind, hexbits = line.split()
    (d if kind == 'd' else f).append(int(hexbits, 16))
with np.errstate(all='ignore'):
    dh = np.array(d, dtype=np.uint64).view(np.float64).astype(np.float16).view(np.uint16)
    fh = np.array(f, dtype=np.uint32).view(np.float32).astype(np.float16).view(np.uint16)
    hf = np.arange(65536, dtype=np.uint32).astype(np.uint16).view(np.float16).astype(np.float32).view(np.uint32)
out = sys.stdout
out.write('numpy %s\n' % np.__version__)
for v in dh: out.write('d %04x\n' % v)
for v in fh: out.write('f %04x\n' % v)
for v in hf: out.write('h %08x\n' % v)
)PY";

/// The sample: edges of binary16, every kind of special, midpoints and their
/// neighbours (double rounding traps among them), and values spread across the
/// range with full fractions.
std::vector<double> sample_doubles() {
  std::vector<double> v{0.0, -0.0, 1.0, -1.0, kBinary16Max, -kBinary16Max, 65519.0, 65520.0,
                        std::nextafter(65520.0, 0.0), 65536.0, 1e10, -1e300,
                        kBinary16MinNormal, kBinary16MinSubnormal, 0x1p-25, std::nextafter(0x1p-25, 1.0),
                        3 * 0x1p-26, 1e-8, 1e-300, 5e-324,
                        std::numeric_limits<double>::infinity(), -std::numeric_limits<double>::infinity(),
                        std::numeric_limits<double>::quiet_NaN(), -std::numeric_limits<double>::quiet_NaN()};
  // Midpoints between consecutive binary16 values, every 17th pattern, and
  // doubles a hair either side (these double-round if converted via float32).
  for (std::uint32_t b = 0; b < 0x7C00; b += 17) {
    const double lo = binary16_to_float(static_cast<std::uint16_t>(b));
    const double hi = binary16_to_float(static_cast<std::uint16_t>(b + 1));
    const double mid = lo + (hi - lo) / 2;
    for (double x : {mid, -mid, mid + (hi - lo) * 0x1p-30, mid - (hi - lo) * 0x1p-30}) v.push_back(x);
  }
  std::uint64_t state = 12345;  // a fixed linear congruential sequence
  for (int i = 0; i < 2000; ++i) {
    state = state * 6364136223846793005u + 1442695040888963407u;
    const int exponent = static_cast<int>(state >> 59) - 26;  // 2^-26 … 2^5
    const double m = 1.0 + static_cast<double>(state & ((std::uint64_t{1} << 52) - 1)) * 0x1p-52;
    v.push_back(std::ldexp(m, exponent + static_cast<int>((state >> 40) & 7)) * ((state >> 58) & 1 ? -1 : 1));
  }
  return v;
}

TEST(VsNumpy, Binary16BitExact) {
  ASSERT_EQ(access(kPython, X_OK), 0) << kPython << " not found: this check needs NumPy (install python3-numpy)";
  const std::vector<double> doubles = sample_doubles();
  std::vector<float> floats;
  for (double x : doubles) floats.push_back(static_cast<float>(x));
  for (std::uint32_t u = 0; u < 0xFFFFFFFFu - 999983u; u += 999983u) floats.push_back(std::bit_cast<float>(u));

  char path[] = "/tmp/headroom_formats_numpy_XXXXXX";
  const int fd = mkstemp(path);
  ASSERT_GE(fd, 0) << "cannot create a temporary file in /tmp";
  close(fd);
  {
    std::ofstream in(path);
    char line[40];
    for (double x : doubles) {
      std::snprintf(line, sizeof line, "d %016llx\n", static_cast<unsigned long long>(std::bit_cast<std::uint64_t>(x)));
      in << line;
    }
    for (float x : floats) {
      std::snprintf(line, sizeof line, "f %08x\n", static_cast<unsigned>(std::bit_cast<std::uint32_t>(x)));
      in << line;
    }
  }
  const std::string command = std::string(kPython) + " -c \"$HEADROOM_NUMPY_SCRIPT\" " + path + " 2>&1";
  setenv("HEADROOM_NUMPY_SCRIPT", kScript, 1);  // passed by environment: no shell quoting of the script
  FILE* pipe = popen(command.c_str(), "r");
  ASSERT_NE(pipe, nullptr) << "cannot run " << kPython;
  std::vector<unsigned> from_double, from_float, to_float;
  std::string unexpected, numpy_version;
  char kind = 0;
  unsigned value = 0;
  char buffer[256];
  while (std::fgets(buffer, sizeof buffer, pipe) != nullptr) {
    if (std::string_view(buffer).starts_with("numpy ")) {
      numpy_version = std::string(buffer + 6, std::strcspn(buffer + 6, "\n"));
    } else if (std::sscanf(buffer, "%c %x", &kind, &value) == 2 && (kind == 'd' || kind == 'f' || kind == 'h')) {
      (kind == 'd' ? from_double : kind == 'f' ? from_float : to_float).push_back(value);
    } else {
      unexpected += buffer;
    }
  }
  const int status = pclose(pipe);
  std::remove(path);
  ASSERT_EQ(status, 0) << kPython << " with numpy failed (install python3-numpy):\n" << unexpected;
  ASSERT_EQ(from_double.size(), doubles.size()) << unexpected;
  ASSERT_EQ(from_float.size(), floats.size()) << unexpected;
  ASSERT_EQ(to_float.size(), 65536u) << unexpected;

  auto nan16 = [](unsigned b) { return (b & 0x7C00) == 0x7C00 && (b & 0x03FF) != 0; };
  auto same16 = [&](unsigned got, unsigned want) {
    return nan16(want) ? nan16(got) && (got & 0x8000) == (want & 0x8000) : got == want;  // NaN by class and sign
  };
  long mismatched = 0;
  for (std::size_t i = 0; i < doubles.size(); ++i) {
    const unsigned got = double_to_binary16(doubles[i]);
    if (!same16(got, from_double[i]) && ++mismatched <= 5)
      ADD_FAILURE() << "FAIL float64->binary16 x=" << std::hexfloat << doubles[i] << std::hex << " got=0x" << got
                    << " numpy=0x" << from_double[i];
  }
  for (std::size_t i = 0; i < floats.size(); ++i) {
    const unsigned got = float_to_binary16(floats[i]);
    if (!same16(got, from_float[i]) && ++mismatched <= 5)
      ADD_FAILURE() << "FAIL float32->binary16 x=" << std::hexfloat << floats[i] << std::hex << " got=0x" << got
                    << " numpy=0x" << from_float[i];
  }
  for (std::uint32_t b = 0; b < 65536; ++b) {
    const auto got = std::bit_cast<std::uint32_t>(binary16_to_float(static_cast<std::uint16_t>(b)));
    const bool nan = (got & 0x7F800000u) == 0x7F800000u && (got & 0x7FFFFFu) != 0;
    const bool ok = nan ? (to_float[b] & 0x7FFFFFFFu) > 0x7F800000u && (got >> 31) == (to_float[b] >> 31)
                        : got == to_float[b];
    if (!ok && ++mismatched <= 5)
      ADD_FAILURE() << std::hex << "FAIL binary16->float32 bits=0x" << b << " got=0x" << got << " numpy=0x"
                    << to_float[b];
  }
  std::printf("vs numpy %s: %zu float64, %zu float32, 65536 binary16 values; %ld mismatched\n",
              numpy_version.c_str(), doubles.size(), floats.size(), mismatched);
  EXPECT_EQ(mismatched, 0);
}

}  // namespace
}  // namespace headroom
