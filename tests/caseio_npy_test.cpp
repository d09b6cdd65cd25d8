// headroom — tests of the .npy reader and writer (npy.h): round trips and every class of bad file.
#include "headroom/npy.h"

#include <gtest/gtest.h>
#include <unistd.h>

#include <bit>
#include <cmath>
#include <fstream>
#include <limits>
#include <string>

#include "headroom/binary16.h"
#include "headroom/input_error.h"

namespace headroom {
namespace {

namespace fs = std::filesystem;

class TempDir {
 public:
  TempDir() {
    std::string tmpl = (fs::temp_directory_path() / "headroom-npy-XXXXXX").string();
    path_ = ::mkdtemp(tmpl.data());
  }
  ~TempDir() { fs::remove_all(path_); }
  const fs::path& path() const { return path_; }

 private:
  fs::path path_;
};

// A .npy file by hand: version major.0, the header text padded to a 64-byte
// boundary unless `pad` is false, then the data bytes.
std::string hand_npy(int major, std::string header, const std::string& data, bool pad = true) {
  const std::size_t prelude = major == 1 ? 10 : 12;
  if (pad) {
    while ((prelude + header.size() + 1) % 64 != 0) header += ' ';
    header += '\n';
  }
  std::string out = "\x93NUMPY";
  out += static_cast<char>(major);
  out += '\0';
  for (std::size_t i = 0; i < prelude - 8; ++i) out += static_cast<char>((header.size() >> (8 * i)) & 0xFF);
  return out + header + data;
}

void write_file(const fs::path& p, const std::string& content) {
  std::ofstream(p, std::ios::binary) << content;
}

// Reads `content` as a file and returns the InputError it must raise.
InputError read_error(const TempDir& dir, const std::string& content) {
  const fs::path p = dir.path() / "bad.npy";
  write_file(p, content);
  try {
    read_npy(p);
  } catch (const InputError& e) {
    EXPECT_EQ(e.file(), p.string());
    // The in-memory parser agrees with the file reader.
    try {
      parse_npy(reinterpret_cast<const unsigned char*>(content.data()), content.size(), p.string());
      ADD_FAILURE() << "parse_npy accepted what read_npy refused: " << e.what();
    } catch (const InputError& e2) {
      EXPECT_STREQ(e.what(), e2.what());
    }
    return e;
  }
  ADD_FAILURE() << "read_npy accepted a bad file";
  return InputError("", "", "", "");
}

std::string f4_bytes(std::initializer_list<float> values) {
  std::string s;
  for (float f : values) {
    const auto u = std::bit_cast<std::uint32_t>(f);
    for (int i = 0; i < 4; ++i) s += static_cast<char>((u >> (8 * i)) & 0xFF);
  }
  return s;
}

Tensor tensor_of(std::vector<std::int64_t> shape, std::vector<double> values) {
  Tensor t;
  t.shape = std::move(shape);
  t.values = std::move(values);
  return t;
}

constexpr double kInf = std::numeric_limits<double>::infinity();

struct DtypeCase {
  const char* descr;
  std::vector<double> values;  // exactly representable in descr
};

TEST(Npy, RoundTripsEveryDtypeAndBothHeaderVersions) {
  const std::vector<DtypeCase> cases = {
      {"<f8", {0.1, -0.0, kInf, -kInf, 0x1p-1074, 1.7976931348623157e308, 3.0}},
      {"<f4", {0.1f, -0.0, kInf, 0x1p-149, 3.4028234663852886e38, -2.5, 1.0}},
      {"<f2", {65504.0, -0.0, 0x1p-24, 0x1p-14, -kInf, 0.333251953125, 1.0}},
      {"<u2", {0x1p-133, -0.0, 3.3895313892515355e38, kInf, 0.1015625, -1.0, 2.0}},
      {"|i1", {-128, 127, 0, -1, 5, 64, -7}},
      {"|u1", {0, 255, 1, 128, 7, 9, 10}},
      {"|b1", {0, 1, 1, 0, 0, 1, 0}},
      {"<i4", {-2147483648.0, 2147483647.0, 0, -1, 7, 8, 9}},
      {"<i8", {-0x1p53, 0x1p53, -0x1p63, 0, 1, -1, 1e15}},
  };
  TempDir dir;
  for (const auto& c : cases) {
    for (NpyVersion v : {NpyVersion::v1_0, NpyVersion::v2_0}) {
      SCOPED_TRACE(std::string(c.descr) + (v == NpyVersion::v1_0 ? " v1.0" : " v2.0"));
      const Tensor t = tensor_of({7}, c.values);
      const NpyArray a = tensor_to_npy(t, c.descr);
      const fs::path p = dir.path() / "x.npy";
      write_npy(p, a, v);
      const auto bytes = npy_file_bytes(a, v);
      EXPECT_EQ(bytes[6], v == NpyVersion::v1_0 ? 1 : 2);
      EXPECT_EQ(fs::file_size(p), bytes.size());
      EXPECT_EQ((bytes.size() - a.bytes.size()) % 64, 0u) << "data must start on a 64-byte boundary";
      const NpyArray back = read_npy(p);
      EXPECT_EQ(back.descr, c.descr);
      EXPECT_EQ(back.shape, a.shape);
      EXPECT_EQ(back.bytes, a.bytes);
      EXPECT_TRUE(bit_identical(npy_to_tensor(back, p), t));
    }
  }
}

TEST(Npy, ShapesOfEveryRankIncludingEmptyAndScalar) {
  TempDir dir;
  const fs::path p = dir.path() / "s.npy";
  for (const std::vector<std::int64_t>& shape :
       std::vector<std::vector<std::int64_t>>{{}, {0}, {3}, {2, 0, 4}, {1, 2, 3, 4}}) {
    Tensor t;
    t.shape = shape;
    std::int64_t n = 1;
    for (auto e : shape) n *= e;
    for (std::int64_t i = 0; i < n; ++i) t.values.push_back(static_cast<double>(i) - 3.5);
    write_npy(p, tensor_to_npy(t, Format::float32));
    const Tensor back = npy_to_tensor(read_npy(p), p);
    EXPECT_TRUE(bit_identical(back, t)) << shape.size();
  }
}

TEST(Npy, NanIsKeptNaN) {
  const Tensor t = tensor_of({2}, {std::numeric_limits<double>::quiet_NaN(), 1.0});
  for (const char* d : {"<f8", "<f4", "<f2", "<u2"}) {
    const Tensor back = npy_to_tensor(tensor_to_npy(t, d), "mem");
    EXPECT_TRUE(std::isnan(back.values[0])) << d;
  }
}

TEST(Npy, FormatDtypes) {
  EXPECT_EQ(npy_descr_of(Format::float64), "<f8");
  EXPECT_EQ(npy_descr_of(Format::float32), "<f4");
  EXPECT_EQ(npy_descr_of(Format::binary16), "<f2");
  EXPECT_EQ(npy_descr_of(Format::bfloat16), "<u2");
  EXPECT_EQ(npy_descr_of(Format::int8), "|i1");
  // bfloat16 1.0 is the upper half of float32 1.0: 0x3F80.
  const NpyArray a = tensor_to_npy(tensor_of({1}, {1.0}), Format::bfloat16);
  EXPECT_EQ(a.bytes, (std::vector<unsigned char>{0x80, 0x3F}));
  const NpyArray h = tensor_to_npy(tensor_of({1}, {1.0}), Format::binary16);
  EXPECT_EQ(h.bytes, (std::vector<unsigned char>{0x00, 0x3C}));  // IEEE 754 binary16 1.0 = 0x3C00
}

TEST(Npy, WritingNeverRoundsSilently) {
  EXPECT_THROW(tensor_to_npy(tensor_of({1}, {0.1}), "<f4"), std::invalid_argument);
  EXPECT_THROW(tensor_to_npy(tensor_of({1}, {1.0 + 0x1p-11}), "<f2"), std::invalid_argument);
  EXPECT_THROW(tensor_to_npy(tensor_of({1}, {65520.0}), "<f2"), std::invalid_argument);  // rounds to inf
  EXPECT_THROW(tensor_to_npy(tensor_of({1}, {1.0 + 0x1p-8}), "<u2"), std::invalid_argument);
  EXPECT_THROW(tensor_to_npy(tensor_of({1}, {128}), "|i1"), std::invalid_argument);
  EXPECT_THROW(tensor_to_npy(tensor_of({1}, {1.5}), "<i4"), std::invalid_argument);
  EXPECT_THROW(tensor_to_npy(tensor_of({1}, {2}), "|b1"), std::invalid_argument);
  EXPECT_THROW(tensor_to_npy(tensor_of({1}, {0x1p63}), "<i8"), std::invalid_argument);
  EXPECT_THROW(tensor_to_npy(tensor_of({2}, {1.0}), "<f8"), std::invalid_argument);
  EXPECT_THROW(tensor_to_npy(tensor_of({1}, {1.0}), "<c16"), std::invalid_argument);
}

TEST(Npy, AcceptsWhatPythonWouldParse) {
  TempDir dir;
  const std::string data = f4_bytes({1.5f, -2.0f});
  // Double quotes, no trailing comma, keys in another order, line breaks.
  for (const std::string& header :
       {std::string("{\"shape\": (2,), \"fortran_order\": False, \"descr\": \"<f4\"}"),
        std::string("{ 'descr' : '<f4' ,\n 'fortran_order':False,'shape':( 2 , ) , }")}) {
    const fs::path p = dir.path() / "ok.npy";
    write_file(p, hand_npy(1, header, data));
    const Tensor t = npy_to_tensor(read_npy(p), p);
    EXPECT_EQ(t.shape, (std::vector<std::int64_t>{2}));
    EXPECT_EQ(t.values, (std::vector<double>{1.5, -2.0})) << header;
  }
  // Version 3.0 (UTF-8 header) has the 2.0 layout; an unpadded header is legal.
  const fs::path p = dir.path() / "v3.npy";
  write_file(p, hand_npy(3, "{'descr': '<f4', 'fortran_order': False, 'shape': (2,)}\n", data, false));
  EXPECT_EQ(read_npy(p).count(), 2);
}

// Each bad-input class: the error names the file and the place, and says what is wrong.
TEST(Npy, RefusesBadFilesNamingFileAndPlace) {
  TempDir dir;
  const std::string ok_header = "{'descr': '<f4', 'fortran_order': False, 'shape': (2,), }";
  const std::string data = f4_bytes({1.0f, 2.0f});
  struct Bad {
    std::string content, place, problem;
  };
  const std::vector<Bad> bad = {
      {hand_npy(1, "{'descr': '<f4', 'fortran_order': True, 'shape': (2,), }", data), "header", "fortran_order is True"},
      {hand_npy(1, "{'descr': '>f4', 'fortran_order': False, 'shape': (2,), }", data), "header", "big-endian"},
      {hand_npy(1, "{'descr': '<c8', 'fortran_order': False, 'shape': (1,), }", data), "header", "unsupported dtype '<c8'"},
      {hand_npy(1, "{'descr': [('a', '<f4')], 'fortran_order': False, 'shape': (2,), }", data), "header, byte 20", "structured"},
      {hand_npy(1, "{'descr' '<f4', 'fortran_order': False, 'shape': (2,), }", data), "header, byte 19", "expected ':'"},
      {hand_npy(1, "descr: '<f4'", data), "header, byte 10", "expected the header to open with '{'"},
      {hand_npy(1, "{'descr': '<f4', 'fortran_order': False, 'shape': (2,), 'x': 1}", data), "header, byte 66", "unknown key 'x'"},
      {hand_npy(1, "{'descr': '<f4', 'descr': '<f4', 'fortran_order': False, 'shape': (2,)}", data), "header, byte 27", "twice"},
      {hand_npy(1, "{'descr': '<f4', 'fortran_order': False}", data), "header", "no 'shape' key"},
      {hand_npy(1, "{'descr': '<f4', 'fortran_order': False, 'shape': (2)}", data), "header", "not a tuple"},
      {hand_npy(1, "{'descr': '<f4', 'fortran_order': False, 'shape': (-2,)}", data), "header", "negative"},
      {hand_npy(1, "{'descr': '<f4', 'fortran_order': 0, 'shape': (2,)}", data), "header", "True or False"},
      {hand_npy(1, "{'descr': '<f4', 'fortran_order': False, 'shape': (2,)} x", data), "header", "after the closing"},
      {hand_npy(1, "{'descr': '<f4, 'fortran_order': False, 'shape': (2,)}", data), "header", "expected ',' or '}'"},
      {hand_npy(1, ok_header, data).substr(0, 40), "header", "truncated header"},
      {hand_npy(1, ok_header, data).substr(0, 9), "header", "truncated header"},
      {std::string("\x93NUMPX\x01\x00", 8) + std::string(120, ' '), "header", "magic"},
      {hand_npy(4, ok_header, data), "header", "version 4.0"},
      {hand_npy(1, ok_header, data.substr(0, 7)), "data", "truncated data"},
      {hand_npy(1, ok_header, data + "xyz"), "data", "3 bytes after the data"},
      {hand_npy(1, "{'descr': '<f8', 'fortran_order': False, 'shape': (1099511627776, 1099511627776), }", data), "data",
       "truncated data"},
      {hand_npy(1, "{'descr': '<f8', 'fortran_order': False, 'shape': (99999999999999999999,), }", data), "header",
       "too large"},
      {hand_npy(1, "{'descr': '|b1', 'fortran_order': False, 'shape': (3,), }", std::string("\x01\x00\x02", 3)),
       "byte 130", "bool element 2 is 2"},
      {std::string("\x93NUMPY\x02\x00\xff\xff\xff\x7f", 12) + "{}", "header", "absurd"},
  };
  for (const auto& b : bad) {
    SCOPED_TRACE(b.problem);
    const InputError e = read_error(dir, b.content);
    EXPECT_EQ(e.place().rfind(b.place, 0), 0u) << e.what();
    EXPECT_NE(e.problem().find(b.problem), std::string::npos) << e.what();
    EXPECT_FALSE(e.fix().empty());
  }
}

TEST(Npy, MissingFile) {
  TempDir dir;
  try {
    read_npy(dir.path() / "nothing.npy");
    FAIL() << "read a missing file";
  } catch (const InputError& e) {
    EXPECT_EQ(e.file(), (dir.path() / "nothing.npy").string());
    EXPECT_NE(e.problem().find("no such file"), std::string::npos);
  }
}

TEST(Npy, Int64BeyondDoubleIsRefused) {
  NpyArray a;
  a.shape = {2};
  a.descr = "<i8";
  a.bytes.assign(16, 0);
  a.bytes[8] = 1;
  a.bytes[15] = 0x01;  // 2^56 + 1: no double holds it
  try {
    npy_to_tensor(a, "lengths.npy");
    FAIL();
  } catch (const InputError& e) {
    EXPECT_EQ(e.file(), "lengths.npy");
    EXPECT_EQ(e.place(), "element 1");
  }
}

TEST(Npy, WriteIsAtomicAndLeavesNoTemporaries) {
  TempDir dir;
  const fs::path p = dir.path() / "a.npy";
  write_npy(p, tensor_to_npy(tensor_of({1}, {1.0}), "<f8"));
  write_npy(p, tensor_to_npy(tensor_of({2}, {2.0, 3.0}), "<f8"));  // replaces it whole
  EXPECT_EQ(npy_to_tensor(read_npy(p), p).values, (std::vector<double>{2.0, 3.0}));
  int entries = 0;
  for ([[maybe_unused]] const auto& e : fs::directory_iterator(dir.path())) ++entries;
  EXPECT_EQ(entries, 1);
  try {
    write_npy(dir.path() / "no" / "such" / "dir.npy", tensor_to_npy(tensor_of({1}, {1.0}), "<f8"));
    FAIL();
  } catch (const InputError& e) {
    EXPECT_EQ(e.place(), "write");
  }
}

}  // namespace
}  // namespace headroom
