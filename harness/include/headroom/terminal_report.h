// headroom — the terminal face of a result: a compact table, the worst figure, one FAIL line per failing case.
//
// Colour follows the NO_COLOR convention (https://no-color.org: a NO_COLOR
// environment variable that is present and not empty turns colour off) and is
// used only when the stream is a terminal — common practice for command-line
// tools, so that logs and pipes get plain text.
#pragma once

#include <cstdio>
#include <string>

#include "headroom/record.h"

namespace headroom {

/// Returns: whether to colour, given whether the stream is a terminal and the
/// value of NO_COLOR (nullptr when unset): is_terminal and NO_COLOR unset or empty.
bool colour_wanted(bool is_terminal, const char* no_color);
/// Returns: colour_wanted(isatty(fileno(stream)), getenv("NO_COLOR")).
bool colour_wanted(std::FILE* stream);

/// Returns: the one greppable line of a failing case (STYLE.md, "failures are
/// one greppable line with a replay"):
///   FAIL kernel=K family=F seed=S case=C expected=<hexfloat> obtained=<hexfloat> ulp=U replay: <command>
/// expected/obtained are the case's worst_expected/worst_obtained as C99 hex
/// floats (exact); ulp is max_ulp. The replay command comes last because it
/// holds spaces. Never coloured (so grep and copy-paste see plain text).
std::string failure_line(const RunRecord& r, const CaseRecord& c);

/// Returns: the summary: a header line (kernel, formats, suite, shard,
/// verdict), a table with one row per family × format and a total row
/// (format, cases, worst ULP, worst scaled error, worst RMSE, faults by class,
/// verdict), the worst figures seen with the case that gave each (also on a
/// pass), then every failing case as failure_line() followed by its reasons
/// indented. `colour` adds ANSI colour to the verdicts and headings only.
std::string terminal_summary(const RunRecord& r, bool colour);

/// Writes terminal_summary(r, colour_wanted(stream)) to `stream`.
void print_summary(std::FILE* stream, const RunRecord& r);

}  // namespace headroom
