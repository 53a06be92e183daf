#include "lumenrig/capture_io/parallel.h"

#include <algorithm>
#include <thread>

#include <tbb/blocked_range.h>
#include <tbb/parallel_for.h>
#include <tbb/partitioner.h>
#include <tbb/task_arena.h>

namespace lumenrig::io {

int ResolveThreads(int requested) {
  if (requested > 0) return requested;
  return std::max(1, tbb::this_task_arena::max_concurrency());
}

// Whether work capped at `n` threads can run in the calling thread's arena:
// it has no more slots than `n`. A nested task_arena is then not only
// unneeded but harmful: the threads of the outer arena (say, the main thread
// waiting for a flow graph while a worker runs a node body) cannot enter it,
// and under a global_control of 2 threads the nested arena would run on its
// creator alone.
static bool CurrentArenaFits(int n) { return tbb::this_task_arena::max_concurrency() <= n; }

void RunCapped(int threads, const std::function<void()>& fn) {
  const int n = ResolveThreads(threads);
  if (CurrentArenaFits(n)) {
    // Isolated: while fn waits for its own tasks, this thread runs only
    // those, never an unrelated task of the outer arena.
    tbb::this_task_arena::isolate(fn);
    return;
  }
  tbb::task_arena arena(n);
  arena.execute(fn);
}

void ParallelFor(int64_t begin, int64_t end, int64_t grain, int threads,
                 const std::function<void(int64_t, int64_t)>& fn) {
  if (end <= begin) return;
  grain = std::max<int64_t>(1, grain);
  const int64_t chunks = (end - begin + grain - 1) / grain;
  auto body = [&](const tbb::blocked_range<int64_t>& r) {
    for (int64_t c = r.begin(); c != r.end(); ++c) {
      const int64_t b = begin + c * grain;
      fn(b, std::min(end, b + grain));
    }
  };
  const int n = ResolveThreads(threads);
  if (n == 1 || chunks == 1) {
    body(tbb::blocked_range<int64_t>(0, chunks));
    return;
  }
  // simple_partitioner with grain 1: one task per fixed chunk, so chunk
  // boundaries never depend on the scheduler or the thread count.
  auto run = [&] { tbb::parallel_for(tbb::blocked_range<int64_t>(0, chunks, 1), body, tbb::simple_partitioner()); };
  if (CurrentArenaFits(n)) {
    tbb::this_task_arena::isolate(run);
    return;
  }
  tbb::task_arena arena(n);
  arena.execute(run);
}

int CurrentThreadIndex() {
  const int index = tbb::this_task_arena::current_thread_index();
  return index < 0 ? 0 : index;
}

uint64_t DeriveSeed(uint64_t seed, uint64_t a, uint64_t b, uint64_t c) {
  // SplitMix64 finaliser applied to a running combination (Steele, Lea and
  // Flood, "Fast splittable pseudorandom number generators", OOPSLA 2014).
  auto mix = [](uint64_t z) {
    z += 0x9e3779b97f4a7c15ULL;
    z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9ULL;
    z = (z ^ (z >> 27)) * 0x94d049bb133111ebULL;
    return z ^ (z >> 31);
  };
  uint64_t h = mix(seed);
  h = mix(h ^ a);
  h = mix(h ^ b);
  h = mix(h ^ c);
  return h;
}

}  // namespace lumenrig::io
