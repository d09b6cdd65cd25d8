/* headroom tests — a plug-in that takes over signal handling inside the call.
 *
 * It ignores SIGTERM, SIGALRM, SIGINT and SIGHUP and blocks every signal it
 * can, then, by HEADROOM_HOSTILE_SIGNALS (read in the call):
 *   "hang"     spins forever                         → timeout (SIGKILL cannot be refused)
 *   "ignore"   sets SIGSEGV to SIG_IGN, reads past q → crash by SIGSEGV (the kernel delivers
 *                                                      a fault's signal even when ignored)
 *   "swallow"  installs a SIGSEGV handler that returns, reads past q
 *                                                    → the access faults forever: timeout
 *   anything else: computes the right answer         → ok
 */
#include <signal.h>
#include <stdlib.h>
#include <string.h>

#include "sound_core.h"

static void swallow(int sig) { (void)sig; }

static int32_t run_signals(const hr_core_problem* p) {
  const char* mode = getenv("HEADROOM_HOSTILE_SIGNALS");
  if (mode == NULL) mode = "";
  signal(SIGTERM, SIG_IGN);
  signal(SIGALRM, SIG_IGN);
  signal(SIGINT, SIG_IGN);
  signal(SIGHUP, SIG_IGN);
  sigset_t all;
  sigfillset(&all);
  sigdelset(&all, SIGSEGV);  /* blocking a fault's signal is the "ignore" case's business */
  sigprocmask(SIG_BLOCK, &all, NULL);
  const volatile float* q = (const volatile float*)p->q.data;
  const long long n = (long long)(p->q.extents[0] * p->q.extents[1] * p->q.extents[2] * p->q.extents[3]);
  if (strcmp(mode, "hang") == 0) {
    volatile unsigned long spins = 0;
    for (;;) spins = spins + 1;
  }
  if (strcmp(mode, "ignore") == 0 || strcmp(mode, "swallow") == 0) {
    if (strcmp(mode, "ignore") == 0) {
      signal(SIGSEGV, SIG_IGN);
    } else {
      struct sigaction sa;
      memset(&sa, 0, sizeof sa);
      sa.sa_handler = swallow;
      sigaction(SIGSEGV, &sa, NULL);
    }
    volatile float x = q[n];  /* one element past the end of q: its guard page */
    (void)x;
  }
  return sound_run(p);
}

const hr_kernel* headroom_kernel_entry(void) {
  static hr_kernel k;
  return hostile_declaration(&k, "hostile_signals", run_signals);
}
