// headroom — tests of case folders (case_folder.h): round trips, atomic writes, and every class of bad case.
#include "headroom/case_folder.h"

#include <gtest/gtest.h>
#include <unistd.h>

#include <cmath>
#include <fstream>
#include <functional>
#include <limits>
#include <nlohmann/json.hpp>
#include <sstream>
#include <string>

#include "headroom/input_error.h"
#include "headroom/npy.h"

namespace headroom {
namespace {

namespace fs = std::filesystem;
using nlohmann::json;

class TempDir {
 public:
  TempDir() {
    std::string tmpl = (fs::temp_directory_path() / "headroom-case-XXXXXX").string();
    path_ = ::mkdtemp(tmpl.data());
  }
  ~TempDir() { fs::remove_all(path_); }
  const fs::path& path() const { return path_; }

 private:
  fs::path path_;
};

// Values exactly representable in `fmt`: multiples of 1/8 in [-8, 8] fit
// bfloat16's 8 significant bits; float32 and float64 get a low bit their
// narrower neighbours cannot hold, so a silent narrowing would show.
Tensor pattern(std::vector<std::int64_t> shape, Format fmt, int salt) {
  Tensor t;
  t.shape = std::move(shape);
  std::int64_t n = 1;
  for (auto e : t.shape) n *= e;
  for (std::int64_t i = 0; i < n; ++i) {
    double v = static_cast<double>((i * 37 + salt * 11) % 129 - 64) / 8.0;
    if (fmt == Format::float32) v += std::ldexp(1.0, -15) * static_cast<double>(i % 3);
    if (fmt == Format::float64) v += std::ldexp(1.0, -45) * static_cast<double>(i % 3);
    t.values.push_back(v);
  }
  if (n > 1) t.values[1] = -0.0;
  return t;
}

Tensor filled(std::vector<std::int64_t> shape, double value) {
  Tensor t;
  std::int64_t n = 1;
  for (auto e : shape) n *= e;
  t.shape = std::move(shape);
  t.values.assign(static_cast<std::size_t>(n), value);
  return t;
}

Case core_case(Format fmt = Format::float32, MaskKind kind = MaskKind::none) {
  Case c;
  c.name = "unit_core";
  c.level = Level::core;
  c.source_format = fmt;
  c.core.shape = CoreShape{2, 4, 2, 3, 5, 4, 3};
  c.core.scale = static_cast<float>(1.0 / std::sqrt(3.0));
  c.core.mask.kind = kind;
  const CoreShape& s = c.core.shape;
  if (kind == MaskKind::key_padding) c.core.mask.key_lengths = {5, 2};
  if (kind == MaskKind::dense) {
    c.core.mask.allowed = filled({s.batch, 1, s.q_len, s.kv_len}, 1.0);
    c.core.mask.allowed.values[3] = 0.0;
  }
  if (kind == MaskKind::bias) {
    c.core.mask.bias = pattern({s.batch, s.q_heads, s.q_len, s.kv_len}, Format::float64, 5);
    c.core.mask.bias.values[2] = -std::numeric_limits<double>::infinity();
  }
  c.core_inputs.q = pattern({s.batch, s.q_heads, s.q_len, s.key_dim}, fmt, 1);
  c.core_inputs.k = pattern({s.batch, s.kv_heads, s.kv_len, s.key_dim}, fmt, 2);
  c.core_inputs.v = pattern({s.batch, s.kv_heads, s.kv_len, s.value_dim}, fmt, 3);
  c.provenance = {"unit", 18446744073709551615ull, "caseio_test --gtest_filter=*"};
  return c;
}

Case block_case() {
  Case c;
  c.name = "unit_block";
  c.level = Level::block;
  c.source_format = Format::float64;
  BlockShape& s = c.block.shape;
  s = BlockShape{1, 3, 4, 8, 2, 1, 4, 3};  // B Tq Tk Dm Hq Hkv Dk Dv
  c.block.scale = 0.5f;
  c.block.mask.kind = MaskKind::causal_bottom_right;
  BlockInputs& in = c.block_inputs;
  in.x_q = pattern({s.batch, s.q_len, s.model_dim}, Format::float64, 1);
  in.x_kv = pattern({s.batch, s.kv_len, s.model_dim}, Format::float64, 2);
  in.w_q = pattern({s.model_dim, s.q_heads * s.key_dim}, Format::float64, 3);
  in.w_k = pattern({s.model_dim, s.kv_heads * s.key_dim}, Format::float64, 4);
  in.w_v = pattern({s.model_dim, s.kv_heads * s.value_dim}, Format::float64, 5);
  in.w_o = pattern({s.q_heads * s.value_dim, s.model_dim}, Format::float64, 6);
  in.b_k = pattern({s.kv_heads * s.key_dim}, Format::float64, 7);
  in.b_o = pattern({s.model_dim}, Format::float64, 8);
  c.provenance = {"external", 0, ""};
  return c;
}

void expect_same_mask(const Mask& a, const Mask& b) {
  EXPECT_EQ(a.kind, b.kind);
  EXPECT_EQ(a.key_lengths, b.key_lengths);
  EXPECT_TRUE(bit_identical(a.allowed, b.allowed));
  EXPECT_TRUE(bit_identical(a.bias, b.bias));
  EXPECT_EQ(a.window_left, b.window_left);
  EXPECT_EQ(a.window_right, b.window_right);
}

void expect_same(const Case& a, const Case& b) {
  EXPECT_EQ(a.name, b.name);
  EXPECT_EQ(a.level, b.level);
  EXPECT_EQ(a.source_format, b.source_format);
  EXPECT_EQ(a.provenance.family, b.provenance.family);
  EXPECT_EQ(a.provenance.seed, b.provenance.seed);
  EXPECT_EQ(a.provenance.command, b.provenance.command);
  if (a.level == Level::core) {
    EXPECT_EQ(a.core.shape, b.core.shape);
    EXPECT_EQ(std::bit_cast<std::uint32_t>(a.core.scale), std::bit_cast<std::uint32_t>(b.core.scale));
    expect_same_mask(a.core.mask, b.core.mask);
    EXPECT_TRUE(bit_identical(a.core_inputs.q, b.core_inputs.q));
    EXPECT_TRUE(bit_identical(a.core_inputs.k, b.core_inputs.k));
    EXPECT_TRUE(bit_identical(a.core_inputs.v, b.core_inputs.v));
    EXPECT_TRUE(bit_identical(a.d_o, b.d_o));
  } else {
    EXPECT_EQ(a.block.shape, b.block.shape);
    EXPECT_EQ(std::bit_cast<std::uint32_t>(a.block.scale), std::bit_cast<std::uint32_t>(b.block.scale));
    expect_same_mask(a.block.mask, b.block.mask);
    const BlockInputs &x = a.block_inputs, &y = b.block_inputs;
    for (auto m : {&BlockInputs::x_q, &BlockInputs::x_kv, &BlockInputs::w_q, &BlockInputs::w_k, &BlockInputs::w_v,
                   &BlockInputs::w_o, &BlockInputs::b_q, &BlockInputs::b_k, &BlockInputs::b_v, &BlockInputs::b_o})
      EXPECT_TRUE(bit_identical(x.*m, y.*m));
  }
}

std::string slurp(const fs::path& p) {
  std::ifstream in(p, std::ios::binary);
  std::stringstream ss;
  ss << in.rdbuf();
  return ss.str();
}

void spit(const fs::path& p, const std::string& s) { std::ofstream(p, std::ios::binary) << s; }

// Reads `dir` expecting an InputError about `file` (a name in the folder)
// whose message contains `text`; returns it for further checks.
InputError read_error(const fs::path& dir, const std::string& file, const std::string& text) {
  try {
    read_case(dir);
  } catch (const InputError& e) {
    EXPECT_EQ(e.file(), (dir / file).string()) << e.what();
    EXPECT_NE(std::string(e.what()).find(text), std::string::npos) << e.what();
    EXPECT_FALSE(e.fix().empty());
    return e;
  }
  ADD_FAILURE() << "read_case accepted a bad case (expected: " << text << ")";
  return InputError("", "", "", "");
}

// Rewrites the manifest of the case in `dir` through `edit`.
void edit_manifest(const fs::path& dir, const std::function<void(json&)>& edit) {
  json j = json::parse(slurp(dir / "manifest.json"));
  edit(j);
  spit(dir / "manifest.json", j.dump(2));
}

TEST(CaseFolder, RoundTripsEverySourceFormatAndMaskKind) {
  TempDir tmp;
  for (Format fmt : {Format::float64, Format::float32, Format::binary16, Format::bfloat16}) {
    for (MaskKind kind : {MaskKind::none, MaskKind::causal_top_left, MaskKind::causal_bottom_right,
                          MaskKind::key_padding, MaskKind::dense, MaskKind::bias}) {
      SCOPED_TRACE(std::string(format_name(fmt)) + " " + std::string(mask_kind_name(kind)));
      const Case c = core_case(fmt, kind);
      const fs::path dir = tmp.path() / "case";
      write_case(c, dir);
      expect_same(read_case(dir), c);
      EXPECT_EQ(read_npy(dir / "q.npy").descr, npy_descr_of(fmt));
    }
  }
  // Only the case folder remains beside: no temporaries, no previous copies.
  int entries = 0;
  for ([[maybe_unused]] const auto& e : fs::directory_iterator(tmp.path())) ++entries;
  EXPECT_EQ(entries, 1);
}

TEST(CaseFolder, RoundTripsASlidingWindow) {
  TempDir tmp;
  Case c = core_case(Format::float32, MaskKind::causal_bottom_right);
  c.core.mask.window_left = 3;
  c.core.mask.window_right = 0;
  write_case(c, tmp.path() / "w");
  const Case back = read_case(tmp.path() / "w");
  expect_same(back, c);
  EXPECT_EQ(back.core.mask.window_left, 3);
  EXPECT_EQ(back.core.mask.window_right, 0);
  const std::string manifest = slurp(tmp.path() / "w" / "manifest.json");
  EXPECT_NE(manifest.find("\"window\""), std::string::npos) << manifest;
  // A case without a window writes no "window" key (older readers stay happy).
  write_case(core_case(Format::float32, MaskKind::none), tmp.path() / "plain");
  EXPECT_EQ(slurp(tmp.path() / "plain" / "manifest.json").find("window"), std::string::npos);
}

TEST(CaseFolder, RoundTripsASoftCapAndSinksExactly) {
  TempDir tmp;
  Case c = core_case(Format::float32, MaskKind::causal_bottom_right);
  c.core.softcap = 0x1.99999ap+4f;  // 25.6, not a short decimal
  c.core.sinks.assign(static_cast<std::size_t>(c.core.shape.q_heads), 0.0f);
  for (std::size_t h = 0; h < c.core.sinks.size(); ++h) c.core.sinks[h] = -0x1.000002p-3f * static_cast<float>(h + 1);
  write_case(c, tmp.path() / "f");
  const Case back = read_case(tmp.path() / "f");
  EXPECT_EQ(back.core.softcap, c.core.softcap);
  EXPECT_EQ(back.core.sinks, c.core.sinks);
  const std::string manifest = slurp(tmp.path() / "f" / "manifest.json");
  EXPECT_NE(manifest.find("\"softcap_hex\": \"0x1.99999ap+4\""), std::string::npos) << manifest;
  // A case without them writes neither key.
  write_case(core_case(Format::float32, MaskKind::none), tmp.path() / "plain");
  const std::string plain = slurp(tmp.path() / "plain" / "manifest.json");
  EXPECT_EQ(plain.find("softcap"), std::string::npos);
  EXPECT_EQ(plain.find("sinks"), std::string::npos);
}

TEST(CaseFolder, RoundTripsDelayedFp8ScalesExactly) {
  TempDir tmp;
  Case c = core_case(Format::float32, MaskKind::none);
  c.core.fp8_delayed.k = 0x1.000002p-5f;  // not a short decimal
  c.core.fp8_delayed.v = 1.0f;
  write_case(c, tmp.path() / "d");
  const Case back = read_case(tmp.path() / "d");
  EXPECT_EQ(back.core.fp8_delayed.q, 0.0f);
  EXPECT_EQ(back.core.fp8_delayed.k, c.core.fp8_delayed.k);
  EXPECT_EQ(back.core.fp8_delayed.v, 1.0f);
  const std::string manifest = slurp(tmp.path() / "d" / "manifest.json");
  EXPECT_NE(manifest.find("\"k\": \"0x1.000002p-5\""), std::string::npos) << manifest;
  EXPECT_EQ(manifest.find("\"q\":"), std::string::npos) << "a fresh (0) scale writes no entry: " << manifest;
  // A case without them writes no key.
  write_case(core_case(Format::float32, MaskKind::none), tmp.path() / "plain");
  EXPECT_EQ(slurp(tmp.path() / "plain" / "manifest.json").find("fp8_delayed"), std::string::npos);
}

TEST(CaseFolder, RoundTripsABlockCaseWithSomeBiases) {
  TempDir tmp;
  const Case c = block_case();
  write_case(c, tmp.path() / "block");
  EXPECT_TRUE(fs::exists(tmp.path() / "block" / "b_k.npy"));
  EXPECT_FALSE(fs::exists(tmp.path() / "block" / "b_q.npy"));
  expect_same(read_case(tmp.path() / "block"), c);
}

TEST(CaseFolder, ManifestAsDocumented) {
  TempDir tmp;
  Case c = core_case(Format::float32, MaskKind::key_padding);
  write_case(c, tmp.path() / "m");
  const json j = json::parse(slurp(tmp.path() / "m" / "manifest.json"));
  EXPECT_EQ(j["headroom_case"], 1);
  EXPECT_EQ(j["level"], "core");
  EXPECT_EQ(j["shape"]["q_heads"], 4);
  EXPECT_FALSE(j["shape"].contains("model_dim"));
  EXPECT_EQ(j["source_format"], "float32");
  EXPECT_EQ(j["mask"]["key_lengths"], json::array({5, 2}));
  EXPECT_EQ(j["provenance"]["seed"], 18446744073709551615ull);
  // 1/√3 in float32 is 0x1.279a74p-1 = 0.577350259 (9 significant digits).
  EXPECT_EQ(j["scale_hex"], "0x1.279a74p-1");
  EXPECT_EQ(j["scale"].get<double>(), 0.577350259);
  // Mask files: a boolean dense mask is '|b1', a bias exact in float32 '<f4'.
  write_case(core_case(Format::float32, MaskKind::dense), tmp.path() / "d");
  EXPECT_EQ(read_npy(tmp.path() / "d" / "mask.npy").descr, "|b1");
  write_case(core_case(Format::float32, MaskKind::bias), tmp.path() / "b");
  EXPECT_EQ(read_npy(tmp.path() / "b" / "bias.npy").descr, "<f8");  // the pattern has bits beyond float32
}

TEST(CaseFolder, ScaleIsExactlyTheFloat32) {
  TempDir tmp;
  const fs::path dir = tmp.path() / "s";
  write_case(core_case(), dir);
  const float want = static_cast<float>(1.0 / std::sqrt(3.0));
  // Without scale_hex, the 9-digit decimal alone gives back the same float32.
  edit_manifest(dir, [](json& j) { j.erase("scale_hex"); });
  EXPECT_EQ(read_case(dir).core.scale, want);
  // The exact decimal expansion of the float32 is accepted too.
  edit_manifest(dir, [&](json& j) { j["scale"] = static_cast<double>(want); });
  EXPECT_EQ(read_case(dir).core.scale, want);
  // 1/√3 as a double is not a float32, and 0.1 is not the 9-digit form of one.
  edit_manifest(dir, [](json& j) { j["scale"] = 1.0 / std::sqrt(3.0); });
  read_error(dir, "manifest.json", "field \"scale\"");
  edit_manifest(dir, [](json& j) { j["scale"] = 0.1; });
  InputError e = read_error(dir, "manifest.json", "0.100000001");
  EXPECT_NE(e.problem().find("not a float32 value"), std::string::npos);
  // scale_hex is authoritative, but must agree with scale and be a float32.
  edit_manifest(dir, [](json& j) {
    j["scale"] = 0.125;
    j["scale_hex"] = "0x1p-2";
  });
  read_error(dir, "manifest.json", "different float32 values");
  edit_manifest(dir, [](json& j) { j["scale_hex"] = "0x1.0000001p-3"; });
  read_error(dir, "manifest.json", "field \"scale_hex\"");
  edit_manifest(dir, [](json& j) { j["scale_hex"] = "0.125"; });
  read_error(dir, "manifest.json", "not a hex float");
  edit_manifest(dir, [](json& j) { j["scale_hex"] = "0x1p-3"; });
  EXPECT_EQ(read_case(dir).core.scale, 0.125f);
}

TEST(CaseFolder, RefusesShapeMismatch) {
  TempDir tmp;
  const fs::path dir = tmp.path() / "c";
  write_case(core_case(), dir);
  write_npy(dir / "k.npy", tensor_to_npy(pattern({2, 4, 5, 4}, Format::float32, 2), Format::float32));
  const InputError e = read_error(dir, "k.npy", "inputs.k.shape: expected [2, 2, 5, 4], found [2, 4, 5, 4]");
  EXPECT_EQ(e.place(), "shape");
}

TEST(CaseFolder, CarriesAnUpstreamGradientWhenGivenOne) {
  TempDir tmp;
  for (Format fmt : {Format::float64, Format::binary16}) {
    Case c = core_case(fmt);
    const CoreShape& s = c.core.shape;
    c.d_o = pattern({s.batch, s.q_heads, s.q_len, s.value_dim}, fmt, 9);
    const fs::path dir = tmp.path() / std::string(format_name(fmt));
    write_case(c, dir);
    EXPECT_EQ(read_npy(dir / "d_o.npy").descr, npy_descr_of(fmt));
    expect_same(read_case(dir), c);
  }
  // Without one, no file; a misshapen or non-finite one is refused naming d_o.npy.
  const fs::path dir = tmp.path() / "plain";
  write_case(core_case(), dir);
  EXPECT_FALSE(fs::exists(dir / "d_o.npy"));
  EXPECT_TRUE(read_case(dir).d_o.values.empty());
  write_npy(dir / "d_o.npy", tensor_to_npy(pattern({2, 4, 3, 4}, Format::float32, 2), Format::float32));
  EXPECT_EQ(read_error(dir, "d_o.npy", "does not match [B, Hq, Tq, Dv]").place(), "shape");
  Tensor bad = pattern({2, 4, 3, 3}, Format::float32, 2);
  bad.values[5] = std::numeric_limits<double>::quiet_NaN();
  write_npy(dir / "d_o.npy", tensor_to_npy(bad, Format::float32));
  read_error(dir, "d_o.npy", "NaN");
}

TEST(CaseFolder, RefusesQueryHeadsNotAMultipleOfKvHeads) {
  TempDir tmp;
  const fs::path dir = tmp.path() / "c";
  write_case(core_case(), dir);
  edit_manifest(dir, [](json& j) { j["shape"]["kv_heads"] = 3; });
  const InputError e = read_error(dir, "manifest.json", "multiple of shape.kv_heads (3)");
  EXPECT_EQ(e.place(), "field \"shape.q_heads\"");
}

TEST(CaseFolder, RefusesCorruptAndTruncatedTensors) {
  TempDir tmp;
  const fs::path dir = tmp.path() / "c";
  write_case(core_case(), dir);
  const std::string q = slurp(dir / "q.npy");

  std::string corrupt = q;
  corrupt[corrupt.find("'shape'") + 1] = 'X';  // an unknown key
  spit(dir / "q.npy", corrupt);
  EXPECT_EQ(read_error(dir, "q.npy", "unknown key 'Xhape'").place().rfind("header, byte", 0), 0u);

  spit(dir / "q.npy", q.substr(0, 50));
  EXPECT_EQ(read_error(dir, "q.npy", "truncated header").place(), "header");

  spit(dir / "q.npy", q.substr(0, q.size() - 4));
  EXPECT_EQ(read_error(dir, "q.npy", "truncated data").place(), "data");
}

TEST(CaseFolder, RefusesDtypeNotMatchingSourceFormat) {
  TempDir tmp;
  const fs::path dir = tmp.path() / "c";
  write_case(core_case(Format::float32), dir);
  write_npy(dir / "v.npy", tensor_to_npy(pattern({2, 2, 5, 3}, Format::float32, 3), Format::float64));
  read_error(dir, "v.npy", "dtype '<f8' where source_format float32 calls for '<f4'");
  write_case(core_case(Format::bfloat16), dir);
  write_npy(dir / "q.npy", tensor_to_npy(pattern({2, 4, 3, 4}, Format::bfloat16, 1), Format::binary16));
  read_error(dir, "q.npy", "calls for '<u2'");
}

TEST(CaseFolder, RefusesMaskOfTheWrongShapeOrKind) {
  TempDir tmp;
  const fs::path dir = tmp.path() / "c";
  write_case(core_case(Format::float32, MaskKind::dense), dir);
  write_npy(dir / "mask.npy", tensor_to_npy(filled({2, 2, 3, 5}, 1.0), "|b1"));  // Hkv heads, not 1 or Hq
  read_error(dir, "mask.npy", "mask.allowed.shape: expected [2, 1 or 4, 3, 5], found [2, 2, 3, 5]");
  write_npy(dir / "mask.npy", tensor_to_npy(filled({2, 1, 3, 5}, 1.0), "<f4"));
  read_error(dir, "mask.npy", "a dense mask calls for '|b1' or '|u1'");

  write_case(core_case(Format::float32, MaskKind::bias), dir);
  Tensor bias = filled({2, 1, 3, 5}, 0.0);
  bias.values[4] = std::numeric_limits<double>::quiet_NaN();
  write_npy(dir / "bias.npy", tensor_to_npy(bias, "<f4"));
  EXPECT_EQ(read_error(dir, "bias.npy", "mask.bias.values[4]").place(), "values[4]");

  // A mask file the manifest does not call for is refused, not ignored.
  write_case(core_case(Format::float32, MaskKind::causal_top_left), dir);
  write_npy(dir / "mask.npy", tensor_to_npy(filled({2, 1, 3, 5}, 1.0), "|b1"));
  read_error(dir, "mask.npy", "not part of a core case with mask kind causal_top_left");
}

TEST(CaseFolder, RefusesMissingFiles) {
  TempDir tmp;
  const fs::path dir = tmp.path() / "c";
  write_case(core_case(), dir);
  fs::remove(dir / "v.npy");
  read_error(dir, "v.npy", "no such file");
  fs::remove(dir / "manifest.json");
  read_error(dir, "manifest.json", "no such file");
  try {
    read_case(tmp.path() / "nowhere");
    FAIL();
  } catch (const InputError& e) {
    EXPECT_EQ(e.file(), (tmp.path() / "nowhere").string());
  }
  fs::remove_all(dir);  // no longer a case folder: write_case would refuse to replace it
  write_case(core_case(Format::float32, MaskKind::dense), dir);
  fs::remove(dir / "mask.npy");
  read_error(dir, "mask.npy", "no such file");
}

TEST(CaseFolder, RefusesBadManifests) {
  TempDir tmp;
  const fs::path dir = tmp.path() / "c";
  write_case(core_case(Format::float32, MaskKind::key_padding), dir);
  const std::string good = slurp(dir / "manifest.json");
  struct Bad {
    std::function<void(json&)> edit;
    std::string place, text;
  };
  const std::vector<Bad> bad = {
      {[](json& j) { j["shape"]["q_head"] = 4; }, "field \"shape.q_head\"", "unknown key \"q_head\""},
      {[](json& j) { j["comment"] = "x"; }, "field \"comment\"", "unknown key"},
      {[](json& j) { j["shape"]["model_dim"] = 8; }, "field \"shape.model_dim\"", "unknown key"},  // core case
      {[](json& j) { j["shape"].erase("key_dim"); }, "field \"shape.key_dim\"", "missing field"},
      {[](json& j) { j.erase("provenance"); }, "field \"provenance\"", "missing field"},
      {[](json& j) { j["shape"]["batch"] = "2"; }, "field \"shape.batch\"", "expected an integer, found string"},
      {[](json& j) { j["shape"]["batch"] = 2.0; }, "field \"shape.batch\"", "expected an integer, found number"},
      {[](json& j) { j["shape"]["q_len"] = 0; }, "field \"shape.q_len\"", "an extent >= 1"},
      {[](json& j) { j["mask"]["key_lengths"] = {5, 6}; }, "field \"mask.key_lengths[1]\"", "a length in [0, 5]"},
      {[](json& j) { j["mask"]["key_lengths"] = {5}; }, "field \"mask.key_lengths\"", "2 entries"},
      {[](json& j) { j["mask"]["kind"] = "causal"; }, "field \"mask.kind\"", "unknown mask kind"},
      {[](json& j) { j["mask"]["kind"] = "none"; }, "field \"mask.key_lengths\"", "key_lengths given"},
      {[](json& j) { j["source_format"] = "f32"; }, "field \"source_format\"", "unknown source format"},
      {[](json& j) { j["mask"]["window"] = {{"left", -2}, {"right", -1}}; }, "field \"mask.window\"", "sides must be"},
      {[](json& j) { j["mask"]["window"] = {{"left", 3}}; }, "field \"mask.window.right\"", "missing field"},
      {[](json& j) { j["mask"]["window"] = {{"left", 3}, {"right", 0}, {"up", 1}}; }, "field \"mask.window.up\"", "unknown key"},
      {[](json& j) { j["softcap_hex"] = "30"; }, "field \"softcap_hex\"", "is not a hex float"},
      {[](json& j) { j["softcap_hex"] = "-0x1p+4"; }, "field \"softcap_hex\"", "must be > 0"},
      {[](json& j) { j["softcap_hex"] = "0x1.0000001p+4"; }, "field \"softcap_hex\"", "not a float32 value"},
      {[](json& j) { j["sinks_hex"] = json::array(); }, "field \"sinks_hex\"", "non-empty array"},
      {[](json& j) { j["fp8_delayed_scales_hex"] = "0x1p+0"; }, "field \"fp8_delayed_scales_hex\"", "at least one entry"},
      {[](json& j) { j["fp8_delayed_scales_hex"] = {{"o", "0x1p+0"}}; }, "field \"fp8_delayed_scales_hex.o\"", "unknown key"},
      {[](json& j) { j["fp8_delayed_scales_hex"] = {{"k", "0x0p+0"}}; }, "field \"fp8_delayed_scales_hex.k\"", "must be > 0"},
      {[](json& j) { j["fp8_delayed_scales_hex"] = {{"v", "1"}}; }, "field \"fp8_delayed_scales_hex.v\"", "is not a hex float"},
      {[](json& j) { j["sinks_hex"] = {"0x1p+0", 2}; }, "field \"sinks_hex[1]\"", "hex float string"},
      {[](json& j) { j["source_format"] = "int8"; }, "field \"source_format\"", "unknown source format"},
      {[](json& j) { j["level"] = "layer"; }, "field \"level\"", "unknown level"},
      {[](json& j) { j["headroom_case"] = 2; }, "field \"headroom_case\"", "version 2"},
      {[](json& j) { j["name"] = "../escape"; }, "field \"name\"", "not a valid case name"},
      {[](json& j) { j["provenance"]["seed"] = -1; }, "field \"provenance.seed\"", "expected an integer in [0, 2^64)"},
      {[](json& j) {
         j["scale"] = 0;
         j.erase("scale_hex");
       },
       "field \"scale\"", "a finite nonzero float32"},
  };
  for (const auto& b : bad) {
    SCOPED_TRACE(b.text);
    spit(dir / "manifest.json", good);
    edit_manifest(dir, b.edit);
    EXPECT_EQ(read_error(dir, "manifest.json", b.text).place(), b.place);
  }
}

TEST(CaseFolder, JsonErrorsGiveLineAndColumn) {
  TempDir tmp;
  const fs::path dir = tmp.path() / "c";
  write_case(core_case(), dir);
  spit(dir / "manifest.json", "{\n  \"headroom_case\": 1,\n  \"name\" \"x\"\n}\n");
  // The place is that of the last character read, the end of the offending
  // token "x" (nlohmann::json::parse_error::byte, converted to line and column).
  EXPECT_EQ(read_error(dir, "manifest.json", "expected ':'").place(), "line 3, column 12");
  spit(dir / "manifest.json", "{\n\"a\": 1,\n}");
  EXPECT_EQ(read_error(dir, "manifest.json", "not valid JSON").place(), "line 3, column 1");
  spit(dir / "manifest.json", "{\"headroom_case\": 1,");
  EXPECT_EQ(read_error(dir, "manifest.json", "not valid JSON").place().rfind("line 1, column ", 0), 0u);
  spit(dir / "manifest.json", "[1, 2]");
  read_error(dir, "manifest.json", "not a JSON object");
  // nlohmann::json would keep the last of two equal keys; a case must not.
  spit(dir / "manifest.json", "{\"shape\": {\"batch\": 1, \"batch\": 2}}");
  EXPECT_EQ(read_error(dir, "manifest.json", "more than once").place(), "field \"shape.batch\"");
}

TEST(CaseFolder, RefusesNonFiniteInputs) {
  TempDir tmp;
  const fs::path dir = tmp.path() / "c";
  write_case(core_case(Format::float32), dir);
  Tensor k = pattern({2, 2, 5, 4}, Format::float32, 2);
  k.at(1, 0, 2, 3) = std::numeric_limits<double>::infinity();
  write_npy(dir / "k.npy", tensor_to_npy(k, Format::float32));
  EXPECT_EQ(read_error(dir, "k.npy", "infinite").place(), "element 51 [1, 0, 2, 3]");
}

TEST(CaseFolder, WriteRefusesInvalidCasesAndLeavesNothingBehind) {
  TempDir tmp;
  const fs::path dir = tmp.path() / "c";
  Case c = core_case();
  c.core.shape.q_heads = 3;
  EXPECT_THROW(write_case(c, dir), InputError);
  c = core_case();
  c.core_inputs.q.values[0] = 0.1;  // not a float32
  try {
    write_case(c, dir);
    FAIL();
  } catch (const InputError& e) {
    EXPECT_EQ(e.file(), (dir / "q.npy").string());
  }
  c = core_case();
  c.name = "a/b";
  EXPECT_THROW(write_case(c, dir), InputError);
  EXPECT_TRUE(fs::is_empty(tmp.path()));
}

TEST(CaseFolder, WriteReplacesACaseWholeAndKeepsItOnFailure) {
  TempDir tmp;
  const fs::path dir = tmp.path() / "c";
  write_case(core_case(Format::float32, MaskKind::dense), dir);
  const Case next = core_case(Format::float64, MaskKind::none);
  write_case(next, dir);
  EXPECT_FALSE(fs::exists(dir / "mask.npy"));  // nothing of the previous case survives
  expect_same(read_case(dir), next);

  Case broken = next;
  broken.core_inputs.v.values.pop_back();
  EXPECT_THROW(write_case(broken, dir), InputError);
  expect_same(read_case(dir), next);  // the failed write left the previous case as it was

  // A folder that is not a case is never replaced.
  const fs::path other = tmp.path() / "other";
  fs::create_directory(other);
  spit(other / "notes.txt", "mine");
  EXPECT_THROW(write_case(next, other), InputError);
  EXPECT_EQ(slurp(other / "notes.txt"), "mine");
  int entries = 0;
  for ([[maybe_unused]] const auto& e : fs::directory_iterator(tmp.path())) ++entries;
  EXPECT_EQ(entries, 2);
}

}  // namespace
}  // namespace headroom
