// headroom — .npy files and case folders checked against NumPy itself.
//
// The outside reference is NumPy's numpy.load / numpy.save /
// numpy.lib.format.write_array (numpy/lib/format.py), run as
// /usr/bin/python3 (the Debian interpreter with python3-numpy). Files we write
// must load in NumPy with the same bytes; files NumPy writes, in format
// versions 1.0 and 2.0, must read back bit for bit, and their values must
// equal NumPy's own conversion to float64 (so our binary16 and bfloat16
// decoding is checked against NumPy's, not against itself).
#include <gtest/gtest.h>
#include <unistd.h>

#include <bit>
#include <cmath>
#include <cstdlib>
#include <cstring>
#include <fstream>
#include <limits>
#include <nlohmann/json.hpp>
#include <random>
#include <sstream>
#include <string>

#include "headroom/case_folder.h"
#include "headroom/input_error.h"
#include "headroom/npy.h"

namespace headroom {
namespace {

namespace fs = std::filesystem;
using nlohmann::json;

constexpr const char* kPython = "/usr/bin/python3";

class TempDir {
 public:
  TempDir() {
    std::string tmpl = (fs::temp_directory_path() / "headroom-numpy-XXXXXX").string();
    path_ = ::mkdtemp(tmpl.data());
  }
  ~TempDir() { fs::remove_all(path_); }
  const fs::path& path() const { return path_; }

 private:
  fs::path path_;
};

std::string slurp(const fs::path& p) {
  std::ifstream in(p, std::ios::binary);
  std::stringstream ss;
  ss << in.rdbuf();
  return ss.str();
}

// Runs `script` with /usr/bin/python3 in `dir`; returns its exit status, output in `log`.
int run_python(const fs::path& dir, const std::string& script, std::string& log) {
  std::ofstream(dir / "check.py") << script;
  const std::string cmd = "cd '" + dir.string() + "' && " + kPython + " check.py > out.log 2>&1";
  const int rc = std::system(cmd.c_str());
  log = slurp(dir / "out.log");
  return rc;
}

class VsNumpy : public ::testing::Test {
 protected:
  void SetUp() override {
    const std::string probe = std::string(kPython) + " -c 'import numpy' > /dev/null 2>&1";
    ASSERT_EQ(std::system(probe.c_str()), 0)
        << "this test needs " << kPython << " with numpy (Debian package python3-numpy); it is missing";
  }
  TempDir tmp_;
};

std::vector<unsigned char> random_bytes(std::size_t n, std::mt19937_64& rng, bool boolean) {
  std::vector<unsigned char> b(n);
  for (auto& x : b) x = static_cast<unsigned char>(boolean ? rng() & 1 : rng() & 0xFF);
  return b;
}

TEST_F(VsNumpy, FilesWeWriteLoadInNumpyBitForBit) {
  const std::vector<std::string> descrs = {"<f8", "<f4", "<f2", "<u2", "|i1", "|u1", "|b1", "<i4", "<i8"};
  std::mt19937_64 rng(20240601);  // fixed seed: the same bytes every run
  json index = json::object();
  for (const auto& d : descrs) {
    for (int v = 1; v <= 2; ++v) {
      NpyArray a;
      a.shape = {3, 1, 5};
      a.descr = d;
      a.bytes = random_bytes(15 * *npy_item_size(d), rng, d == "|b1");
      const std::string name = "r" + std::to_string(v) + "_" + d.substr(1);
      write_npy(tmp_.path() / (name + ".npy"), a, v == 1 ? NpyVersion::v1_0 : NpyVersion::v2_0);
      std::ofstream(tmp_.path() / (name + ".raw"), std::ios::binary)
          .write(reinterpret_cast<const char*>(a.bytes.data()), static_cast<std::streamsize>(a.bytes.size()));
      index[name] = {{"descr", d}, {"shape", a.shape}, {"version", v}};
    }
  }
  // Values through Tensor: format edges NumPy must read as the same float64.
  const double inf = std::numeric_limits<double>::infinity();
  const std::vector<std::pair<std::string, std::vector<double>>> valued = {
      {"<f2", {65504.0, -65504.0, 0x1p-24, 0x1p-14 - 0x1p-24, -0.0, inf, 1.0 / 1024 + 1}},
      {"<f4", {0x1p-149, 3.4028234663852886e38, -0.0, -inf, 0.1f, 16777217.0 - 1, 1.0}},
      {"<f8", {0x1p-1074, 1.7976931348623157e308, -0.0, 0.1, 1.0 / 3, -inf, 2.0}},
  };
  for (const auto& [d, values] : valued) {
    Tensor t;
    t.shape = {static_cast<std::int64_t>(values.size())};
    t.values = values;
    const std::string name = "t_" + d.substr(1);
    write_npy(tmp_.path() / (name + ".npy"), tensor_to_npy(t, d));
    std::ofstream(tmp_.path() / (name + ".f8"), std::ios::binary)
        .write(reinterpret_cast<const char*>(values.data()), static_cast<std::streamsize>(values.size() * 8));
    index[name] = {{"descr", d}, {"shape", t.shape}, {"version", 1}};
  }
  std::ofstream(tmp_.path() / "index.json") << index.dump();

  const std::string script = R"PY(
import json, sys
import numpy as np
index = json.load(open('index.json'))
bad = 0
for name, e in sorted(index.items()):
    with open(name + '.npy', 'rb') as f:
        version = np.lib.format.read_magic(f)
    a = np.load(name + '.npy', allow_pickle=False)
    ok = (version == (e['version'], 0) and a.dtype.str == e['descr'] and list(a.shape) == e['shape']
          and a.flags.c_contiguous)
    if name.startswith('r'):
        ok = ok and a.tobytes() == open(name + '.raw', 'rb').read()
    else:
        want = np.fromfile(name + '.f8', dtype='<f8')
        got = a.astype('<f8')
        ok = ok and got.tobytes() == want.tobytes()
    print(('OK   ' if ok else 'FAIL ') + name, version, a.dtype.str, a.shape)
    bad += not ok
print('checked', len(index), 'files,', bad, 'failed')
sys.exit(1 if bad else 0)
)PY";
  std::string log;
  EXPECT_EQ(run_python(tmp_.path(), script, log), 0) << log;
  EXPECT_NE(log.find("checked 21 files, 0 failed"), std::string::npos) << log;
}

TEST_F(VsNumpy, FilesNumpyWritesReadBackBitForBit) {
  const std::string script = R"PY(
import json
import numpy as np
rng = np.random.default_rng(7)
arrays = {
    'f8': np.concatenate([rng.normal(size=20) * 1e3, [np.inf, -0.0, 5e-324, np.finfo('<f8').max]]).astype('<f8'),
    'f4': (rng.normal(size=(2, 3, 4)) * 100).astype('<f4'),
    'f2': np.concatenate([rng.normal(size=30), [65504, -65504, 6e-8, 6.1e-5, -0.0, np.inf]]).astype('<f2'),
    # bfloat16 as bit patterns: every exponent, random significands and signs.
    'u2': rng.integers(0, 65536, size=(4, 16), dtype='<u2'),
    'i1': np.arange(-128, 128, dtype='|i1').reshape(16, 16),
    'u1': np.arange(0, 256, dtype='|u1'),
    'b1': rng.integers(0, 2, size=(3, 1, 7)).astype('|b1'),
    'i4': np.array([-2**31, 2**31 - 1, 0, -1, 12345], dtype='<i4'),
    'i8': np.array([-2**53, 2**53, 0, -1, 2**40 + 3], dtype='<i8'),
    'scalar': np.array(2.5, dtype='<f4'),
    'empty': np.zeros((0, 3), dtype='<f8'),
    'rank4': rng.normal(size=(1, 2, 3, 5)).astype('<f4'),
}
index = {}
for name, a in arrays.items():
    np.save(name + '_v1.npy', a)
    with open(name + '_v2.npy', 'wb') as f:
        np.lib.format.write_array(f, a, version=(2, 0))
    a.tofile(name + '.raw')
    if name == 'u2':  # bfloat16: the upper half of a float32
        values = (a.astype('<u4') << 16).view('<f4').astype('<f8')
    else:
        values = a.astype('<f8')
    values.tofile(name + '.f8')
    index[name] = {'descr': a.dtype.str, 'shape': list(a.shape)}
json.dump(index, open('index.json', 'w'))
np.save('fortran.npy', np.asfortranarray(np.ones((2, 3), dtype='<f4')))
np.save('big.npy', np.ones(3, dtype='>f8'))
print('wrote', len(index))
)PY";
  std::string log;
  ASSERT_EQ(run_python(tmp_.path(), script, log), 0) << log;
  const json index = json::parse(slurp(tmp_.path() / "index.json"));
  int checked = 0;
  for (const auto& [name, e] : index.items()) {
    const std::string raw = slurp(tmp_.path() / (name + ".raw"));
    const std::string f8 = slurp(tmp_.path() / (name + ".f8"));
    for (const char* v : {"_v1.npy", "_v2.npy"}) {
      SCOPED_TRACE(name + v);
      const fs::path p = tmp_.path() / (name + v);
      const std::string file = slurp(p);
      EXPECT_EQ(static_cast<int>(file[6]), v[2] - '0') << "NumPy wrote another header version than asked";
      const NpyArray a = read_npy(p);
      EXPECT_EQ(a.descr, e["descr"].get<std::string>());
      EXPECT_EQ(a.shape, e["shape"].get<std::vector<std::int64_t>>());
      EXPECT_EQ(std::string(a.bytes.begin(), a.bytes.end()), raw);
      const Tensor t = npy_to_tensor(a, p);
      ASSERT_EQ(t.values.size() * 8, f8.size());
      std::size_t mismatched = 0;
      for (std::size_t i = 0; i < t.values.size(); ++i) {
        double want;
        std::memcpy(&want, f8.data() + 8 * i, 8);
        const bool same = std::isnan(want) ? std::isnan(t.values[i])
                                           : std::bit_cast<std::uint64_t>(want) == std::bit_cast<std::uint64_t>(t.values[i]);
        if (!same && mismatched++ < 3)
          ADD_FAILURE() << "element " << i << ": numpy " << std::hexfloat << want << ", headroom " << t.values[i];
      }
      EXPECT_EQ(mismatched, 0u);
      ++checked;
    }
  }
  EXPECT_EQ(checked, 24);
  for (const char* refused : {"fortran.npy", "big.npy"}) EXPECT_THROW(read_npy(tmp_.path() / refused), InputError) << refused;
}

TEST_F(VsNumpy, CaseFoldersAreNumpyFriendlyBothWays) {
  // NumPy and Python's json module make a case folder by hand...
  const std::string script = R"PY(
import json, os
import numpy as np
rng = np.random.default_rng(11)
os.mkdir('np_case')
q = rng.normal(size=(1, 4, 3, 8)).astype('<f4')
k = rng.normal(size=(1, 2, 5, 8)).astype('<f4')
v = rng.normal(size=(1, 2, 5, 6)).astype('<f4')
mask = rng.integers(0, 2, size=(1, 1, 3, 5)).astype(bool)
for name, a in [('q', q), ('k', k), ('v', v), ('mask', mask)]:
    np.save(os.path.join('np_case', name + '.npy'), a)
scale = np.float32(1 / np.sqrt(8))
manifest = {'headroom_case': 1, 'name': 'np_case', 'level': 'core',
            'shape': {'batch': 1, 'q_heads': 4, 'kv_heads': 2, 'q_len': 3, 'kv_len': 5, 'key_dim': 8, 'value_dim': 6},
            'scale': float('%.9g' % scale), 'source_format': 'float32', 'mask': {'kind': 'dense'},
            'provenance': {'family': 'numpy', 'seed': 11, 'command': 'check.py'}}
json.dump(manifest, open(os.path.join('np_case', 'manifest.json'), 'w'), indent=1)
print(scale.view('<u4'))
)PY";
  std::string log;
  ASSERT_EQ(run_python(tmp_.path(), script, log), 0) << log;
  const Case c = read_case(tmp_.path() / "np_case");
  // float32(1/√8) = 0x1.6a09e6p-2; the 9-digit decimal gives it back exactly.
  EXPECT_EQ(c.core.scale, 0x1.6a09e6p-2f);
  EXPECT_EQ(std::stoul(log), std::bit_cast<std::uint32_t>(c.core.scale));
  EXPECT_EQ(c.core.mask.allowed.shape, (std::vector<std::int64_t>{1, 1, 3, 5}));
  EXPECT_EQ(c.core_inputs.v.shape, (std::vector<std::int64_t>{1, 2, 5, 6}));

  // ... and what we write back, NumPy loads to the same bytes.
  write_case(c, tmp_.path() / "hr_case");
  const std::string back = R"PY(
import json, sys
import numpy as np
ok = True
for name in ['q', 'k', 'v', 'mask']:
    a = np.load('np_case/%s.npy' % name)
    b = np.load('hr_case/%s.npy' % name)
    ok = ok and a.dtype == b.dtype and a.shape == b.shape and a.tobytes() == b.tobytes()
m = json.load(open('hr_case/manifest.json'))
ok = ok and np.float32(m['scale']) == np.float32(float.fromhex(m['scale_hex'])) == np.float32(1 / np.sqrt(8))
print('same' if ok else 'different')
sys.exit(0 if ok else 1)
)PY";
  EXPECT_EQ(run_python(tmp_.path(), back, log), 0) << log;
  EXPECT_NE(log.find("same"), std::string::npos) << log;
}

}  // namespace
}  // namespace headroom
