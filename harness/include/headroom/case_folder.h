// headroom — a case on disk: one folder, a JSON manifest and .npy tensors under fixed names.
//
// The manifest names no paths, so nothing in a case can point outside its
// folder. Tensors (see npy.h for the dtypes):
//
//   core   q.npy [B, Hq, Tq, Dk]   k.npy [B, Hkv, Tk, Dk]   v.npy [B, Hkv, Tk, Dv]
//          optional d_o.npy [B, Hq, Tq, Dv]: the upstream gradient dO for backward kernels
//   block  x_q.npy [B, Tq, Dm]  x_kv.npy [B, Tk, Dm]
//          w_q.npy [Dm, Hq·Dk]  w_k.npy [Dm, Hkv·Dk]  w_v.npy [Dm, Hkv·Dv]  w_o.npy [Hq·Dv, Dm]
//          optional b_q.npy [Hq·Dk]  b_k.npy [Hkv·Dk]  b_v.npy [Hkv·Dv]  b_o.npy [Dm]
//   mask   mask.npy [B, 1|Hq, Tq, Tk], '|b1' or '|u1' (nonzero = visible), kind "dense" only
//          bias.npy [B, 1|Hq, Tq, Tk], '<f4' or '<f8' (finite or −inf), kind "bias" only
//
// The input tensors' dtype is that of source_format: float64 '<f8', float32
// '<f4', binary16 '<f2', bfloat16 '<u2' (bit patterns; NumPy has no bfloat16).
// Their values must be finite.
//
// manifest.json (format version 1; docs/case-format.md has the same with examples):
//   {"headroom_case": 1,
//    "name": "gauss_s8",                       // [A-Za-z0-9_.+-], the folder's name by convention
//    "level": "core" | "block",
//    "shape": {"batch": 1, "q_heads": 8, "kv_heads": 8, "q_len": 16, "kv_len": 16,
//              "key_dim": 64, "value_dim": 64},  // block adds "model_dim"
//    "scale": 0.125,                           // the float32 value printed with 9 significant digits
//    "scale_hex": "0x1p-3",                    // optional hex float; authoritative when present
//    "source_format": "float32" | "float64" | "binary16" | "bfloat16",
//    "mask": {"kind": "none" | "causal_top_left" | "causal_bottom_right" | "key_padding" | "dense" | "bias",
//             "key_lengths": [16]},            // key_padding only, one per batch
//    "provenance": {"family": "gaussian", "seed": 7, "command": "headroom generate ..."}}
//
// Reading checks everything and refuses, with an InputError naming the file
// (manifest.json or the .npy) and the field: an unknown or repeated key, a
// missing field, a wrong JSON type, a JSON syntax error (place "line L,
// column C"), a scale that is not exactly a float32 (or disagrees with
// scale_hex), a tensor dtype not matching source_format, a shape not matching
// the manifest (Hq not a multiple of Hkv included, via validate() in
// problem.h), a missing file, a stray .npy file the manifest does not call for,
// and a non-finite input value. Nothing is silently adjusted.
#pragma once

#include <filesystem>
#include <string_view>

#include "headroom/case.h"

namespace headroom {

/// The manifest's "headroom_case" value this code reads and writes.
inline constexpr int kCaseFormatVersion = 1;

/// Returns: the case stored in folder `dir`. Throws InputError as described above.
Case read_case(const std::filesystem::path& dir);

/// Returns: whether `name` is a valid case name: 1 to 200 characters from
/// [A-Za-z0-9_.+-], and not "." or "..". Records and journals hold the same names.
bool valid_case_name(std::string_view name);

/// Writes `c` as folder `dir`, atomically: the case is written into a
/// temporary folder beside `dir` and renamed into place, so an interrupted
/// write leaves either the previous folder or the complete new one, never half
/// a case. An existing `dir` is replaced only when it is empty or a case
/// folder (it holds manifest.json); anything else is refused.
/// Throws InputError when `c` is not a valid case (same checks as read_case,
/// plus: each tensor value exactly representable in source_format) or the
/// folder cannot be written.
void write_case(const Case& c, const std::filesystem::path& dir);

}  // namespace headroom
