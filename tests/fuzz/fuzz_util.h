// Small helpers shared by the libFuzzer targets: a failed invariant aborts with a message (so
// libFuzzer records the input as a crash), and a status code is checked against a documented set.
// Not thread-safe; each target runs one input at a time.
#ifndef GRAFT_TESTS_FUZZ_FUZZ_UTIL_H_
#define GRAFT_TESTS_FUZZ_FUZZ_UTIL_H_

#include <cstdio>
#include <cstdlib>
#include <string>

namespace graft::fuzz {

// Prints `what` and aborts: the input that got here breaks a documented promise.
[[noreturn]] inline void Broken(const std::string& what) {
  std::fprintf(stderr, "graft fuzz: invariant broken: %s\n", what.c_str());
  std::fflush(stderr);
  std::abort();
}

inline void Require(bool ok, const std::string& what) {
  if (!ok) Broken(what);
}

}  // namespace graft::fuzz

#endif  // GRAFT_TESTS_FUZZ_FUZZ_UTIL_H_
