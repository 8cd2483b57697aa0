// A clock the test sets by hand, for a Coordinator (or Launcher) run in-process: lease expiry,
// start-up requeue and backoff then follow the test's steps, not the machine's speed.
// Thread-safe: the coordinator's sweeper may read it while the test moves it.
#ifndef GRAFT_TESTS_FAKE_CLOCK_H_
#define GRAFT_TESTS_FAKE_CLOCK_H_

#include <atomic>
#include <cstdint>

#include "server/coordinator.h"

namespace graft::testing {

class FakeClock : public server::Clock {
 public:
  explicit FakeClock(int64_t start_ms) : now_ms(start_ms) {}
  int64_t NowMs() override { return now_ms.load(); }
  std::atomic<int64_t> now_ms;
};

}  // namespace graft::testing

#endif  // GRAFT_TESTS_FAKE_CLOCK_H_
