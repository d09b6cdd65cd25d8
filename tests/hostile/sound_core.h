/* headroom tests — the example plug-in's sound kernel, for hostile plug-ins to misbehave around.
 *
 * Each hostile plug-in computes the right answer with examples/plugin/my_kernel.c
 * and adds one kind of hostility around it, so a test can tell the hostility's
 * effect from a wrong result: a run that survives it is bit-identical to the
 * example plug-in's.
 */
#ifndef HEADROOM_TESTS_HOSTILE_SOUND_CORE_H
#define HEADROOM_TESTS_HOSTILE_SOUND_CORE_H

#define headroom_kernel_entry hostile_sound_entry
#include "my_kernel.c"
#undef headroom_kernel_entry

#include <string.h>

/* The example kernel's declaration under another name and run function. */
static inline const hr_kernel* hostile_declaration(hr_kernel* out, const char* name, int32_t (*run)(const hr_core_problem*)) {
  memcpy(out, hostile_sound_entry(), sizeof *out);
  out->name = name;
  out->run_core = run;
  return out;
}

/* The sound computation. */
static inline int32_t sound_run(const hr_core_problem* p) { return run_core(p); }

#endif
