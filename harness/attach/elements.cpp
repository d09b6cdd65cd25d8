// headroom — element bytes per format (elements.h).
#include "attach/elements.h"

#include <cstring>
#include <stdexcept>

#include "headroom/binary16.h"
#include "headroom/fp8.h"

namespace headroom::attach_detail {
namespace {

// Quiet NaNs (IEEE 754-2019 §6.2.1: leading significand bit set) with a
// recognisable payload; none is a value any correct kernel produces by chance.
constexpr std::uint64_t kUnwritten64 = 0x7FF8DEAD0000DEADull;
constexpr std::uint32_t kUnwritten32 = 0x7FC0DEADu;
constexpr std::uint16_t kUnwrittenBinary16 = 0x7EADu;
constexpr std::uint16_t kUnwrittenBfloat16 = 0x7FADu;

}  // namespace

std::size_t item_size(Format f) {
  switch (f) {
    case Format::float64: return 8;
    case Format::float32: return 4;
    case Format::binary16:
    case Format::bfloat16: return 2;
    case Format::int8:
    case Format::e4m3:
    case Format::e5m2: return 1;
  }
  return 0;
}

void store_element(Format f, double x, unsigned char* dst) {
  switch (f) {
    case Format::float64: std::memcpy(dst, &x, 8); return;
    case Format::float32: {
      float v = static_cast<float>(x);
      std::memcpy(dst, &v, 4);
      return;
    }
    case Format::binary16: {
      std::uint16_t v = double_to_binary16(x);
      std::memcpy(dst, &v, 2);
      return;
    }
    case Format::bfloat16: {
      std::uint16_t v = double_to_bfloat16(x);
      std::memcpy(dst, &v, 2);
      return;
    }
    case Format::int8:
    case Format::e4m3:
    case Format::e5m2: break;
  }
  throw std::logic_error("store_element: int8 and 8-bit float codes are stored by the caller");
}

double load_element(Format f, const unsigned char* src) {
  switch (f) {
    case Format::float64: {
      double v;
      std::memcpy(&v, src, 8);
      return v;
    }
    case Format::float32: {
      float v;
      std::memcpy(&v, src, 4);
      return v;
    }
    case Format::binary16: {
      std::uint16_t v;
      std::memcpy(&v, src, 2);
      return binary16_to_float(v);
    }
    case Format::bfloat16: {
      std::uint16_t v;
      std::memcpy(&v, src, 2);
      return bfloat16_to_float(v);
    }
    case Format::int8: return static_cast<double>(static_cast<std::int8_t>(*src));
    case Format::e4m3: return fp8_to_double(*src, Fp8Kind::e4m3);
    case Format::e5m2: return fp8_to_double(*src, Fp8Kind::e5m2);
  }
  return 0.0;
}

void fill_unwritten(Format f, unsigned char* dst, std::size_t count) {
  const std::size_t n = item_size(f);
  for (std::size_t i = 0; i < count; ++i, dst += n) {
    switch (f) {
      case Format::float64: std::memcpy(dst, &kUnwritten64, 8); break;
      case Format::float32: std::memcpy(dst, &kUnwritten32, 4); break;
      case Format::binary16: std::memcpy(dst, &kUnwrittenBinary16, 2); break;
      case Format::bfloat16: std::memcpy(dst, &kUnwrittenBfloat16, 2); break;
      case Format::int8: *dst = 0x80; break;
      case Format::e4m3: *dst = 0x7F; break;  // E4M3's NaN
      case Format::e5m2: *dst = 0x7E; break;  // an E5M2 quiet NaN
    }
  }
}

bool is_unwritten(Format f, const unsigned char* src) {
  switch (f) {
    case Format::float64: return std::memcmp(src, &kUnwritten64, 8) == 0;
    case Format::float32: return std::memcmp(src, &kUnwritten32, 4) == 0;
    case Format::binary16: return std::memcmp(src, &kUnwrittenBinary16, 2) == 0;
    case Format::bfloat16: return std::memcmp(src, &kUnwrittenBfloat16, 2) == 0;
    // Every int8 byte is a valid code, and E4M3 has one NaN per sign (E5M2's
    // few carry no room for a mark): a written NaN and the fill look alike.
    case Format::int8:
    case Format::e4m3:
    case Format::e5m2: return false;
  }
  return false;
}

}  // namespace headroom::attach_detail
