/* headroom tests — a plug-in that writes to stdout and stderr (buffered and
 * raw, a lot of it) and otherwise computes the right answer. Expected: status
 * ok, output bit-identical to the example plug-in's, headroom's own stdout
 * holding only what headroom wrote. */
#include <stdio.h>
#include <unistd.h>

#include "sound_core.h"

static int32_t run_chatter(const hr_core_problem* p) {
  char line[128];
  printf("hostile_chatter: printf to stdout, Tq=%lld\n", (long long)p->q_len);
  fprintf(stderr, "hostile_chatter: fprintf to stderr\n");
  for (int i = 0; i < 200; ++i) {
    int n = snprintf(line, sizeof line, "hostile_chatter: raw write %d to fd 1 and fd 2\n", i);
    (void)!write(1, line, (size_t)n);
    (void)!write(2, line, (size_t)n);
  }
  fflush(stdout);
  return sound_run(p);
}

const hr_kernel* headroom_kernel_entry(void) {
  static hr_kernel k;
  return hostile_declaration(&k, "hostile_chatter", run_chatter);
}
