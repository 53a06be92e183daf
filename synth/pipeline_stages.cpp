// Stage adapters of the pipeline: each wraps one stage's library call.
#include "pipeline_stages.h"

namespace lumenrig::synth::internal {

const std::vector<StageAdapter>& StageAdapters() {
  static const std::vector<StageAdapter> adapters = [] {
    std::vector<StageAdapter> a;
    return a;
  }();
  return adapters;
}

}  // namespace lumenrig::synth::internal
