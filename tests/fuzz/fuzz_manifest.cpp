// headroom fuzzing — read_case on a case folder whose manifest.json is the fuzzer's bytes.
//
// The tensors beside the manifest are valid and small; which folder is used
// (core or block; plain, dense-mask or bias-mask; source format) follows from
// words in the manifest text, so a seed that is a valid manifest reads as a
// valid case and mutations explore from there. An InputError is the normal
// outcome; anything else is a finding: a crash, a sanitizer report, a leak,
// another exception, or an accepted case that write_case refuses or that does
// not read back identical.
#include <stdlib.h>
#include <unistd.h>

#include <cstddef>
#include <cstdint>
#include <cstdlib>
#include <cstring>
#include <filesystem>
#include <fstream>
#include <string>
#include <string_view>
#include <vector>

#include "fuzz_scratch.h"
#include "headroom/case_folder.h"
#include "headroom/input_error.h"

namespace {

namespace fs = std::filesystem;
using headroom::Case;
using headroom::Format;
using headroom::Level;
using headroom::MaskKind;
using headroom::Tensor;

using headroom::fuzzing::check;

// Values exact in every source format (small multiples of 1/4).
Tensor filled(std::vector<std::int64_t> shape, int salt) {
  Tensor t(std::move(shape));
  for (std::size_t i = 0; i < t.values.size(); ++i) t.values[i] = static_cast<double>(static_cast<int>((i * 7 + salt) % 9) - 4) / 4;
  return t;
}

constexpr Format kFormats[] = {Format::float32, Format::float64, Format::binary16, Format::bfloat16};
constexpr const char* kFormatWords[] = {"float32", "float64", "binary16", "bfloat16"};
enum Variant { kPlain, kDense, kBias };

Case make_case(Level level, Variant variant, Format f) {
  Case c;
  c.name = "seed";
  c.level = level;
  c.source_format = f;
  c.provenance = {"fuzz", 1, "fuzz_manifest"};
  headroom::Mask* mask = nullptr;
  std::int64_t b = 1, hq = 2, tq = 2, tk = 3;
  if (level == Level::core) {
    c.core.shape = {1, 2, 1, 2, 3, 2, 2};
    c.core.scale = 0.5f;
    c.core_inputs.q = filled({1, 2, 2, 2}, 1);
    c.core_inputs.k = filled({1, 1, 3, 2}, 2);
    c.core_inputs.v = filled({1, 1, 3, 2}, 3);
    mask = &c.core.mask;
  } else {
    c.block.shape = {1, 2, 3, 4, 2, 1, 2, 2};  // B, Tq, Tk, Dm, Hq, Hkv, Dk, Dv
    c.block.scale = 0.5f;
    auto& in = c.block_inputs;
    in.x_q = filled({1, 2, 4}, 1);
    in.x_kv = filled({1, 3, 4}, 2);
    in.w_q = filled({4, 4}, 3);
    in.w_k = filled({4, 2}, 4);
    in.w_v = filled({4, 2}, 5);
    in.w_o = filled({4, 4}, 6);
    in.b_o = filled({4}, 7);
    mask = &c.block.mask;
  }
  if (variant == kDense) {
    mask->kind = MaskKind::dense;
    mask->allowed = Tensor({b, 1, tq, tk});
    for (std::size_t i = 0; i < mask->allowed.values.size(); ++i) mask->allowed.values[i] = i % 2 == 0 ? 1 : 0;
  } else if (variant == kBias) {
    mask->kind = MaskKind::bias;
    mask->bias = filled({b, hq, tq, tk}, 8);
  } else {
    mask->kind = MaskKind::causal_bottom_right;
  }
  return c;
}

struct Folders {
  fs::path root;
  fs::path dirs[2][3][4];
  fs::path round_trip;
};

// tmpfs when there is one (write_case flushes each file to disk); removed at exit.
fs::path make_root() { return headroom::fuzzing::scratch_dir("fuzz-manifest"); }

const Folders& folders() {
  static const Folders f = [] {
    Folders out;
    out.root = make_root();
    for (int l = 0; l < 2; ++l)
      for (int v = 0; v < 3; ++v)
        for (int fmt = 0; fmt < 4; ++fmt) {
          out.dirs[l][v][fmt] = out.root / ("case_" + std::to_string(l) + std::to_string(v) + std::to_string(fmt));
          headroom::write_case(make_case(l == 0 ? Level::core : Level::block, static_cast<Variant>(v), kFormats[fmt]),
                               out.dirs[l][v][fmt]);
        }
    out.round_trip = out.root / "round_trip";
    // HEADROOM_FUZZ_SEEDS=DIR copies the valid manifests there: how corpus/fuzz_manifest/ was made.
    if (const char* seeds = std::getenv("HEADROOM_FUZZ_SEEDS")) {
      for (int l = 0; l < 2; ++l)
        for (int v = 0; v < 3; ++v)
          for (int fmt = 0; fmt < 4; ++fmt)
            fs::copy_file(out.dirs[l][v][fmt] / "manifest.json",
                          fs::path(seeds) / ("manifest_" + std::string(l == 0 ? "core" : "block") + "_" +
                                             (v == kPlain ? "causal" : v == kDense ? "dense" : "bias") + "_" +
                                             kFormatWords[fmt] + ".json"),
                          fs::copy_options::overwrite_existing);
    }
    std::atexit([] {
      std::error_code ec;
      fs::remove_all(folders().root, ec);
    });
    return out;
  }();
  return f;
}

const fs::path& folder_for(std::string_view text) {
  const int level = text.find("\"block\"") != std::string_view::npos ? 1 : 0;
  const int variant = text.find("\"dense\"") != std::string_view::npos  ? kDense
                      : text.find("\"bias\"") != std::string_view::npos ? kBias
                                                                         : kPlain;
  int format = 0;
  for (int i = 1; i < 4; ++i)
    if (text.find(std::string("\"") + kFormatWords[i] + "\"") != std::string_view::npos) format = i;
  return folders().dirs[level][variant][format];
}

bool same_tensor(const Tensor& a, const Tensor& b) { return headroom::bit_identical(a, b); }

bool same_case(const Case& a, const Case& b) {
  bool same = a.name == b.name && a.level == b.level && a.source_format == b.source_format &&
              a.provenance.family == b.provenance.family && a.provenance.seed == b.provenance.seed &&
              a.provenance.command == b.provenance.command;
  const headroom::Mask& ma = a.level == Level::core ? a.core.mask : a.block.mask;
  const headroom::Mask& mb = b.level == Level::core ? b.core.mask : b.block.mask;
  same = same && ma.kind == mb.kind && ma.key_lengths == mb.key_lengths && same_tensor(ma.allowed, mb.allowed) &&
         same_tensor(ma.bias, mb.bias);
  if (a.level == Level::core) {
    same = same && a.core.shape == b.core.shape && std::memcmp(&a.core.scale, &b.core.scale, sizeof(float)) == 0 &&
           same_tensor(a.core_inputs.q, b.core_inputs.q) && same_tensor(a.core_inputs.k, b.core_inputs.k) &&
           same_tensor(a.core_inputs.v, b.core_inputs.v);
  } else {
    const auto& x = a.block_inputs;
    const auto& y = b.block_inputs;
    same = same && a.block.shape == b.block.shape && std::memcmp(&a.block.scale, &b.block.scale, sizeof(float)) == 0 &&
           same_tensor(x.x_q, y.x_q) && same_tensor(x.x_kv, y.x_kv) && same_tensor(x.w_q, y.w_q) &&
           same_tensor(x.w_k, y.w_k) && same_tensor(x.w_v, y.w_v) && same_tensor(x.w_o, y.w_o) &&
           same_tensor(x.b_q, y.b_q) && same_tensor(x.b_k, y.b_k) && same_tensor(x.b_v, y.b_v) &&
           same_tensor(x.b_o, y.b_o);
  }
  return same;
}

}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size) {
  const std::string_view text(reinterpret_cast<const char*>(data), size);
  const fs::path& dir = folder_for(text);
  {
    std::ofstream out(dir / "manifest.json", std::ios::binary | std::ios::trunc);
    out.write(text.data(), static_cast<std::streamsize>(text.size()));
    check(static_cast<bool>(out));
  }
  Case c;
  try {
    c = headroom::read_case(dir);
  } catch (const headroom::InputError&) {
    return 0;
  }
  // What the reader accepts, the writer writes, and it reads back identical.
  headroom::write_case(c, folders().round_trip);
  check(same_case(c, headroom::read_case(folders().round_trip)));
  return 0;
}
