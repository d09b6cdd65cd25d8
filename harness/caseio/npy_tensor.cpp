// headroom — exact conversion between .npy arrays and Tensors (see npy.h).
//
// Every supported dtype embeds exactly in binary64 except int64 beyond 2^53,
// which is refused rather than rounded. Bytes are assembled little-endian by
// shifts, so the code does not depend on the host's byte order.
#include <bit>
#include <cmath>
#include <cstdio>
#include <cstring>
#include <stdexcept>

#include "headroom/binary16.h"
#include "headroom/input_error.h"
#include "headroom/npy.h"

namespace headroom {
namespace {

std::uint64_t load_le(const unsigned char* p, std::size_t n) {
  std::uint64_t v = 0;
  for (std::size_t i = 0; i < n; ++i) v |= std::uint64_t{p[i]} << (8 * i);
  return v;
}

void store_le(unsigned char* p, std::uint64_t v, std::size_t n) {
  for (std::size_t i = 0; i < n; ++i) p[i] = static_cast<unsigned char>(v >> (8 * i));
}

std::string value_text(double v) {
  char buf[48];
  std::snprintf(buf, sizeof buf, "%.17g (%a)", v, v);
  return buf;
}

// Whether `v` is an integer in [lo, hi]; lo and hi exactly representable.
bool integer_in(double v, double lo, double hi) { return v == std::trunc(v) && v >= lo && v <= hi; }

}  // namespace

std::string_view npy_descr_of(Format f) {
  switch (f) {
    case Format::float64: return "<f8";
    case Format::float32: return "<f4";
    case Format::binary16: return "<f2";
    case Format::bfloat16: return "<u2";
    case Format::int8: return "|i1";
    case Format::e4m3:
    case Format::e5m2: return "|u1";
  }
  return "";
}

Tensor npy_to_tensor(const NpyArray& a, const std::filesystem::path& file) {
  const auto item = npy_item_size(a.descr);
  const auto count = static_cast<std::size_t>(a.count());
  if (!item || a.bytes.size() != count * *item)
    throw InputError(file.string(), "data", "array of dtype '" + a.descr + "' holds " + std::to_string(a.bytes.size()) +
                     " bytes, not " + std::to_string(count) + " elements", "read the file with read_npy");
  Tensor t;
  t.shape = a.shape;
  t.values.resize(count);
  const unsigned char* p = a.bytes.data();
  const std::string_view d = a.descr;
  for (std::size_t i = 0; i < count; ++i, p += *item) {
    const std::uint64_t raw = load_le(p, *item);
    double v = 0;
    if (d == "<f8") {
      v = std::bit_cast<double>(raw);
    } else if (d == "<f4") {
      v = std::bit_cast<float>(static_cast<std::uint32_t>(raw));
    } else if (d == "<f2") {
      v = binary16_to_float(static_cast<std::uint16_t>(raw));
    } else if (d == "<u2") {
      v = bfloat16_to_float(static_cast<std::uint16_t>(raw));
    } else if (d == "|i1") {
      v = static_cast<std::int8_t>(raw);
    } else if (d == "|u1" || d == "|b1") {
      v = static_cast<double>(raw);
    } else if (d == "<i4") {
      v = static_cast<std::int32_t>(raw);
    } else {  // "<i8"
      const auto x = static_cast<std::int64_t>(raw);
      v = static_cast<double>(x);
      // 2^63 itself is not an int64, so compare in double before casting back.
      if (v >= 0x1p63 || static_cast<std::int64_t>(v) != x)
        throw InputError(file.string(), "element " + std::to_string(i),
                         "int64 value " + std::to_string(x) + " is not exactly representable as a double",
                         "keep integer values within ±2^53");
    }
    t.values[i] = v;
  }
  return t;
}

NpyArray tensor_to_npy(const Tensor& t, std::string_view descr) {
  const auto item = npy_item_size(descr);
  if (!item) throw std::invalid_argument("tensor_to_npy: unsupported descr '" + std::string(descr) + "'");
  std::size_t count = 1;
  for (auto e : t.shape) {
    if (e < 0) throw std::invalid_argument("tensor_to_npy: negative extent");
    count *= static_cast<std::size_t>(e);
  }
  if (count != t.values.size())
    throw std::invalid_argument("tensor_to_npy: " + std::to_string(t.values.size()) + " values for a shape of " +
                                std::to_string(count) + " elements");
  NpyArray a;
  a.shape = t.shape;
  a.descr = std::string(descr);
  a.bytes.resize(count * *item);
  unsigned char* p = a.bytes.data();
  for (std::size_t i = 0; i < count; ++i, p += *item) {
    const double v = t.values[i];
    std::uint64_t raw = 0;
    bool exact = true;
    if (descr == "<f8") {
      raw = std::bit_cast<std::uint64_t>(v);
    } else if (descr == "<f4") {
      const auto f = static_cast<float>(v);
      exact = std::isnan(v) || static_cast<double>(f) == v;
      raw = std::bit_cast<std::uint32_t>(f);
    } else if (descr == "<f2") {
      raw = double_to_binary16(v);
      exact = std::isnan(v) || static_cast<double>(binary16_to_float(static_cast<std::uint16_t>(raw))) == v;
    } else if (descr == "<u2") {
      raw = double_to_bfloat16(v);
      exact = std::isnan(v) || static_cast<double>(bfloat16_to_float(static_cast<std::uint16_t>(raw))) == v;
    } else if (descr == "|i1") {
      exact = integer_in(v, -128, 127);
      if (exact) raw = static_cast<std::uint8_t>(static_cast<std::int8_t>(v));
    } else if (descr == "|u1") {
      exact = integer_in(v, 0, 255);
      if (exact) raw = static_cast<std::uint64_t>(v);
    } else if (descr == "|b1") {
      exact = v == 0.0 || v == 1.0;
      raw = v == 1.0 ? 1 : 0;
    } else if (descr == "<i4") {
      exact = integer_in(v, -0x1p31, 0x1p31 - 1);
      if (exact) raw = static_cast<std::uint32_t>(static_cast<std::int32_t>(v));
    } else {  // "<i8"
      exact = integer_in(v, -0x1p63, 0x1p63 - 1024);  // the largest double below 2^63
      if (exact) raw = static_cast<std::uint64_t>(static_cast<std::int64_t>(v));
    }
    // The float dtypes keep the sign of zero (conversions preserve it); an
    // integer dtype has one zero, so -0 stores as 0 like any integer value.
    if (!exact)
      throw std::invalid_argument("tensor_to_npy: value " + std::to_string(i) + " = " + value_text(v) +
                                  " is not exactly representable as '" + std::string(descr) + "'");
    store_le(p, raw, *item);
  }
  return a;
}

NpyArray tensor_to_npy(const Tensor& t, Format f) { return tensor_to_npy(t, npy_descr_of(f)); }

}  // namespace headroom
