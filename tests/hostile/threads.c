/* headroom tests — a plug-in that computes the right answer, then starts
 * threads that keep writing NaN into its output and returns while they run.
 * It returns only once every thread has written at least once, so the
 * scribbling is certain, not a race. Expected (isolated): status ok, the
 * output holds NaN (scored as the fault non_finite), the threads die with the
 * child: headroom's own thread count is unchanged and the next case runs. */
#include <math.h>
#include <pthread.h>
#include <stdatomic.h>

#include "sound_core.h"

enum { kThreads = 4 };
static atomic_int g_started;

static void* scribble(void* arg) {
  const hr_core_problem* p = (const hr_core_problem*)arg;
  volatile float* o = (volatile float*)p->o.data;
  const long long n = (long long)(p->o.extents[0] * p->o.extents[1] * p->o.extents[2] * p->o.extents[3]);
  for (int first = 1;; first = 0) {
    for (long long i = 0; i < n; ++i) o[i] = NAN;
    if (first) atomic_fetch_add(&g_started, 1);
  }
  return NULL;
}

static int32_t run_threads(const hr_core_problem* p) {
  static hr_core_problem copy; /* outlives the call, as the threads do */
  int32_t rc = sound_run(p);
  copy = *p;
  atomic_store(&g_started, 0);
  for (int i = 0; i < kThreads; ++i) {
    pthread_t t;
    if (pthread_create(&t, NULL, scribble, &copy) == 0) pthread_detach(t);
  }
  while (atomic_load(&g_started) < kThreads) {
  }
  return rc;
}

const hr_kernel* headroom_kernel_entry(void) {
  static hr_kernel k;
  return hostile_declaration(&k, "hostile_threads", run_threads);
}
