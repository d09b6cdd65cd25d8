// headroom — a case: one problem with its input tensors and where it came from.
//
// The tensors hold the *source* values (float32 or float64, as generated or as
// shipped). A kernel of another input format receives them rounded or
// quantised (attach stage); the reference is computed on what it received.
#pragma once

#include <cstdint>
#include <string>

#include "headroom/format.h"
#include "headroom/problem.h"

namespace headroom {

enum class Level : unsigned char { core, block };

struct Provenance {
  std::string family;   ///< generator family, or "external"
  std::uint64_t seed = 0;
  std::string command;  ///< the command that made the case
};

struct Case {
  std::string name;                      ///< folder name; unique in a suite
  Level level = Level::core;
  CoreProblem core;                      ///< level core
  CoreInputs core_inputs;
  Tensor d_o;                            ///< level core, optional: the upstream gradient dO [B, Hq, Tq, Dv]
                                         ///< for judging backward kernels; empty (shape {}) when absent
  BlockProblem block;                    ///< level block
  BlockInputs block_inputs;
  Format source_format = Format::float32;  ///< the format the tensors are exact in
  Provenance provenance;
};

}  // namespace headroom
