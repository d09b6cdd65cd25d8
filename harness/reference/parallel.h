// headroom — a deterministic parallel loop for the reference.
//
// Items are independent (a query row, a head, a projected row): each writes
// only its own outputs, and what it computes does not depend on which worker
// runs it or in what order, so results are bit-identical for every thread
// count. Workers take items from a shared counter (rows differ in cost when
// some need more precision). Each worker widens MPFR's exponent range for its
// own thread (MPFR keeps it per thread) and frees MPFR's per-thread caches
// when it ends.
#pragma once

#include <algorithm>
#include <atomic>
#include <cstdint>
#include <exception>
#include <mutex>
#include <thread>
#include <vector>

#include "mp_arith.h"

namespace headroom::detail {

/// Returns: the number of workers to use for `count` items with `threads`
/// requested (0 means one per hardware thread); at least 1.
inline unsigned worker_count(std::int64_t count, unsigned threads) {
  unsigned t = threads == 0 ? std::max(1u, std::thread::hardware_concurrency()) : threads;
  if (count < static_cast<std::int64_t>(t)) t = static_cast<unsigned>(std::max<std::int64_t>(1, count));
  return t;
}

/// Calls fn(item, worker) for every item in [0, count) on `workers` threads
/// (workers ≥ 1; worker < workers indexes per-worker scratch). The first
/// exception thrown by any call is rethrown here after all workers stop.
template <class Fn>
void parallel_for(std::int64_t count, unsigned workers, Fn&& fn) {
  std::atomic<std::int64_t> next{0};
  std::exception_ptr failure;
  std::mutex failure_lock;
  auto work = [&](unsigned worker) {
    WideExponentRange range;
    try {
      for (std::int64_t item = next++; item < count; item = next++) fn(item, worker);
    } catch (...) {
      std::lock_guard<std::mutex> lock(failure_lock);
      if (!failure) failure = std::current_exception();
      next = count;
    }
  };
  if (workers <= 1) {
    work(0);
  } else {
    std::vector<std::thread> pool;
    pool.reserve(workers - 1);
    for (unsigned w = 1; w < workers; ++w)
      pool.emplace_back([&work, w] {
        work(w);
        // MPFR keeps constant caches (log 2, exp tables) per thread; a thread
        // must free its own before it ends (MPFR 4.2 manual, §5.15,
        // mpfr_free_cache2). Global caches stay, other threads may use them.
        mpfr_free_cache2(MPFR_FREE_LOCAL_CACHE);
      });
    work(0);
    for (auto& t : pool) t.join();
  }
  if (failure) std::rethrow_exception(failure);
}

}  // namespace headroom::detail
