// headroom — reading and writing NumPy .npy files, strictly.
//
// The format is NumPy's own ("numpy.lib.format", format spec versions 1.0,
// 2.0 and 3.0): the magic "\x93NUMPY", a major and minor version byte, a
// little-endian header length (2 bytes in 1.0, 4 bytes in 2.0 and 3.0), then
// an ASCII (3.0: UTF-8) Python dict literal with exactly the keys 'descr',
// 'fortran_order' and 'shape', padded with spaces and ended by '\n'; then the
// raw data. headroom reads and writes only little-endian, C-order data of the
// dtypes below; anything else is refused with an InputError naming the file,
// the place ("header", "byte 57", "data") and the fix. Sizes are checked
// against the file's length — and against the machine's physical memory, since a
// sparse file can be long without holding anything — before any buffer for the
// data is allocated, so a corrupt header cannot make the reader allocate what
// the file does not hold.
//
//   descr  meaning                          Tensor values
//   '<f8'  float64                          exact
//   '<f4'  float32                          exact
//   '<f2'  binary16 (IEEE 754-2019 half)    exact
//   '<u2'  bfloat16 bit patterns (a manifest says so; NumPy has no bfloat16)
//   '|i1'  int8 (quantised codes)           exact
//   '|u1'  uint8                            exact
//   '|b1'  bool, each byte 0 or 1           0 or 1
//   '<i4'  int32                            exact
//   '<i8'  int64                            exact when |x| ≤ 2^53, else refused
#pragma once

#include <cstddef>
#include <cstdint>
#include <filesystem>
#include <limits>
#include <optional>
#include <string>
#include <string_view>
#include <vector>

#include "headroom/format.h"
#include "headroom/input_file.h"
#include "headroom/tensor.h"

namespace headroom {

/// One array as stored: C-order extents, the NumPy dtype string and the
/// little-endian element bytes (size = product of shape × item size).
struct NpyArray {
  std::vector<std::int64_t> shape;
  std::string descr;
  std::vector<unsigned char> bytes;

  /// Returns: the product of the extents (1 for rank 0).
  std::int64_t count() const;
};

/// Returns: the item size in bytes of a supported descr, or nothing.
std::optional<std::size_t> npy_item_size(std::string_view descr);

/// Returns: the array stored in `file`.
/// Throws InputError for: a missing or unreadable file, a bad magic string,
/// an unknown version, a header that is not a Python dict literal with exactly
/// the three keys, fortran_order True, a big-endian or unknown dtype, a
/// negative extent, more than 32 axes, a size that overflows, data shorter or
/// longer than the shape says, data larger than physical memory, or a bool
/// byte other than 0 and 1.
NpyArray read_npy(const std::filesystem::path& file);
/// Returns: the array stored in `f`, opened by open_input_file(file,
/// kNpyInput) or open_input_file_in (for a file that must not leave its
/// folder); checks as above.
NpyArray read_npy(const InputFile& f, const std::filesystem::path& file);

/// An .npy file as an input file (input_file.h): its data is bounded by the
/// header's shape, which read_npy checks against the file's size and the
/// machine's physical memory, so the cap is only that of the file system.
inline constexpr InputKind kNpyInput{"tensor file (.npy)", std::numeric_limits<std::uint64_t>::max(),
                                     "give a NumPy .npy file (numpy.save)"};

/// Returns: the array held in `data`, as read_npy would read it from a file
/// of that content; `file` names it in errors.
NpyArray parse_npy(const unsigned char* data, std::size_t size, const std::string& file);

/// Header version written: automatic picks 1.0 unless the header needs more
/// than 65535 bytes, then 2.0.
enum class NpyVersion : unsigned char { automatic, v1_0, v2_0 };

/// Returns: the complete file content for `a` (header padded with spaces so
/// the data starts at a multiple of 64 bytes, as NumPy does).
/// Preconditions: a.descr supported, a.bytes.size() = count × item size;
/// throws std::invalid_argument otherwise.
std::vector<unsigned char> npy_file_bytes(const NpyArray& a, NpyVersion version = NpyVersion::automatic);

/// Writes `a` to `file` atomically: into a temporary file in the same folder,
/// flushed to disk, then renamed over `file`, so a reader never sees half a
/// file. Throws InputError when the folder cannot be written;
/// std::invalid_argument as npy_file_bytes.
void write_npy(const std::filesystem::path& file, const NpyArray& a, NpyVersion version = NpyVersion::automatic);

/// Returns: the values of `a` as doubles, exactly (see the table above).
/// '<u2' is decoded as bfloat16 bit patterns. `file` names the array in errors.
/// Throws InputError when a '<i8' value is beyond ±2^53.
Tensor npy_to_tensor(const NpyArray& a, const std::filesystem::path& file);

/// Returns: `t` stored with dtype `descr` (any supported descr; '<u2' stores
/// bfloat16 patterns). Preconditions: every value is exactly representable in
/// that dtype (NaN allowed for the float dtypes), values.size() matches shape;
/// throws std::invalid_argument naming the first value that is not — never
/// rounds silently.
NpyArray tensor_to_npy(const Tensor& t, std::string_view descr);

/// Returns: `t` stored in the dtype of format `f`: float64 '<f8', float32
/// '<f4', binary16 '<f2', bfloat16 '<u2', int8 '|i1' (codes). Preconditions
/// and throws as tensor_to_npy above.
NpyArray tensor_to_npy(const Tensor& t, Format f);

/// Returns: the descr that stores format `f` (see tensor_to_npy).
std::string_view npy_descr_of(Format f);

}  // namespace headroom
