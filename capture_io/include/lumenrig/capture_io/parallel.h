#pragma once
/// \file parallel.h
/// The one parallel idiom of lumenrig (STYLE.md rule 5): a band/tile
/// ParallelFor on TBB capped at `threads`: in the calling thread's arena
/// (isolated) when it is no wider than the cap, otherwise in a task_arena of
/// `threads` slots (see DEVELOPERS.md, "one parallel idiom"). Chunks are fixed
/// by (begin, end, grain) alone, never by the scheduler, so any per-chunk
/// computation is bit-identical for any thread count. Random seeds must come
/// from sample and pixel indices (see DeriveSeed), never from the thread.

#include <cstdint>
#include <functional>

namespace lumenrig::io {

/// Number of worker threads to use: `requested` if > 0, otherwise every core.
int ResolveThreads(int requested);

/// Calls fn(chunk_begin, chunk_end) for consecutive chunks [b, e) of at most
/// `grain` items covering [begin, end), on at most `threads` threads
/// (0 = all cores). Chunk boundaries are begin + k*grain regardless of threads.
void ParallelFor(int64_t begin, int64_t end, int64_t grain, int threads,
                 const std::function<void(int64_t, int64_t)>& fn);

/// Index of the calling worker inside the current ParallelFor arena, in
/// [0, ResolveThreads(threads)); use it only to pick per-thread scratch.
int CurrentThreadIndex();

/// Runs fn() capped at `threads` (the calling arena, isolated, when it is no
/// wider; otherwise a task_arena of that many slots), so that nested TBB
/// algorithms (parallel_for, Eigen is not affected) respect the cap.
void RunCapped(int threads, const std::function<void()>& fn);

/// A 64-bit seed for (base seed, a, b, c): SplitMix64 mixing, so streams of
/// neighbouring pixels or samples are independent.
uint64_t DeriveSeed(uint64_t seed, uint64_t a, uint64_t b = 0, uint64_t c = 0);

}  // namespace lumenrig::io
