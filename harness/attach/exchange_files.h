// headroom — the files of an external-program exchange, shared by the forward and backward calls.
//
// Internal to the attach stage (external_program.cpp defines them,
// backward_exchange.cpp reuses them): writing one .npy file plainly into the
// private exchange folder, reading one output back strictly, and the forward
// problem.json with its input files, which a backward call extends.
#pragma once

#include <cstdint>
#include <filesystem>
#include <optional>
#include <string>
#include <vector>

#include <nlohmann/json.hpp>

#include "headroom/attach.h"
#include "headroom/npy.h"

namespace headroom::attach_detail {

/// Writes `a` as `dir/file` (no fsync: the folder is private and short-lived).
/// Throws std::runtime_error when it cannot.
void put(const std::filesystem::path& dir, const std::string& file, const NpyArray& a);

/// Returns: `dir/file` as a tensor when it exists with dtype `descr` and shape
/// `shape`; else nothing, with `bad` saying "FILE: what is wrong" (`meaning`
/// completes "not written (the program must write …)").
std::optional<Tensor> read_output(const std::filesystem::path& dir, const std::string& file, const std::string& descr,
                                  const std::vector<std::int64_t>& shape, const char* meaning, std::string& bad);

/// Writes the input files of a forward call of `d` on `c` into `dir` and
/// returns its problem.json object (not yet written). Preconditions: as write_exchange.
nlohmann::json exchange_problem(const std::filesystem::path& dir, const ReceivedCase& c, const KernelDeclaration& d);

/// Writes `problem` as dir/problem.json. Throws std::runtime_error when it cannot.
void write_problem(const std::filesystem::path& dir, const nlohmann::json& problem);

}  // namespace headroom::attach_detail
