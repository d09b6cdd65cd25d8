// headroom — attaching an external program that declared "serve": 1 (persistent mode).
//
// Internal to the attach stage: attach_program (external_program.cpp) calls it
// when the declaration opts in. The program is started on the first call and
// serves every later one (program_session.h); a call's faults are those of
// one-shot mode: crash (it ended, or replied "error"), timeout (over the
// call's limit), bad_output (files as in one-shot mode, or a reply that breaks
// the protocol), unsupported (it replied "unsupported").
#pragma once

#include <memory>
#include <string>

#include "headroom/attach.h"

namespace headroom::attach_detail {

/// Returns: the kernel `command` serves under declaration `d`. Starts nothing yet.
std::unique_ptr<AttachedKernel> attach_served_program(const std::string& command, KernelDeclaration d);

}  // namespace headroom::attach_detail
