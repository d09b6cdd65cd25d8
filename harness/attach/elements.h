// headroom — one element of a kernel buffer: its size and its bytes in each format.
//
// Internal to the attach stage. Values are doubles exactly representable in
// the format (receive() made them so); storing never rounds, loading is exact.
#pragma once

#include <cstddef>
#include <cstdint>

#include "headroom/format.h"

namespace headroom::attach_detail {

/// Returns: bytes per element: float64 8, float32 4, binary16/bfloat16 2, int8/e4m3/e5m2 1.
std::size_t item_size(Format f);

/// Stores `x` at `dst` in format f (binary16/bfloat16 as bit patterns).
/// Preconditions: f is not int8/e4m3/e5m2 (codes are stored by the caller) and x is a
/// value of f (or NaN/±inf).
void store_element(Format f, double x, unsigned char* dst);

/// Returns: the value of the element of format f at `src`, exactly.
double load_element(Format f, const unsigned char* src);

/// Fills `count` elements at `dst` with a quiet NaN of format f whose payload
/// marks "never written" (so an element a kernel forgot reads as NaN).
void fill_unwritten(Format f, unsigned char* dst, std::size_t count);

/// Returns: whether the element of format f at `src` still holds the pattern
/// fill_unwritten writes (for int8, E4M3 and E5M2, always false: their fill cannot be told from a written code).
bool is_unwritten(Format f, const unsigned char* src);

}  // namespace headroom::attach_detail
