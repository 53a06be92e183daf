#pragma once
// Internal to capture_io: set-up shared by the HDF5 writer and reader.
namespace lumenrig::io::internal {

/// Opens the HDF5 library once (without an atexit close) and turns off its
/// automatic error printing for the calling thread (the switch is per thread
/// in thread-safe builds). Call before any HDF5 use on a thread.
void SilenceHdf5();

}  // namespace lumenrig::io::internal
