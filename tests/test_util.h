// Small helpers shared by graft's tests: status assertions, a scoped temporary directory,
// running a subprocess and capturing its output. Not thread-safe; use from test bodies.
#ifndef GRAFT_TESTS_TEST_UTIL_H_
#define GRAFT_TESTS_TEST_UTIL_H_

#include <functional>
#include <string>
#include <vector>

#include "absl/status/status.h"
#include "absl/status/statusor.h"
#include "gtest/gtest.h"

#define ASSERT_OK(expr)                                            \
  do {                                                             \
    const ::absl::Status _st = ::graft::testing::ToStatus(expr);   \
    ASSERT_TRUE(_st.ok()) << #expr << " failed: " << _st;          \
  } while (0)

#define EXPECT_OK(expr)                                            \
  do {                                                             \
    const ::absl::Status _st = ::graft::testing::ToStatus(expr);   \
    EXPECT_TRUE(_st.ok()) << #expr << " failed: " << _st;          \
  } while (0)

namespace graft::testing {

inline absl::Status ToStatus(const absl::Status& s) { return s; }
template <typename T>
absl::Status ToStatus(const absl::StatusOr<T>& s) {
  return s.status();
}

// A fresh directory under $TMPDIR (or /tmp), removed with its contents on destruction.
class ScopedTempDir {
 public:
  ScopedTempDir();
  ~ScopedTempDir();
  ScopedTempDir(const ScopedTempDir&) = delete;
  ScopedTempDir& operator=(const ScopedTempDir&) = delete;
  const std::string& path() const { return path_; }

 private:
  std::string path_;
};

struct CommandResult {
  int exit_code = -1;  // the process's exit status, or 128 + signal
  std::string output;  // stdout and stderr, interleaved
};

// Runs `command` with /bin/sh -c, capturing stdout and stderr. REQUIRES: the command ends.
CommandResult RunCommand(const std::string& command);

// A child process started with posix_spawn, its stdout and stderr appended to a log file.
// Killed (SIGKILL) and reaped on destruction if still running.
class ScopedProcess {
 public:
  ScopedProcess(const std::vector<std::string>& argv, const std::string& log_path);
  ~ScopedProcess();
  ScopedProcess(const ScopedProcess&) = delete;
  ScopedProcess& operator=(const ScopedProcess&) = delete;
  int pid() const { return pid_; }
  bool started() const { return pid_ > 0; }
  // Sends `signal`; returns false if the process is gone.
  bool Signal(int signal);
  // Waits up to `timeout_ms` for the process to exit; returns its exit code (128 + signal when
  // killed), or -1 on timeout.
  int Wait(int timeout_ms);
  const std::string& log_path() const { return log_path_; }

 private:
  int pid_ = -1;
  bool reaped_ = false;
  int exit_code_ = -1;
  std::string log_path_;
};

// Polls `condition` every 20 ms until it holds or `timeout_ms` passes; returns whether it held.
bool WaitFor(const std::function<bool()>& condition, int timeout_ms);

// Writes `contents` to `path`, replacing it. Fails the current test on error.
void WriteFile(const std::string& path, const std::string& contents);
std::string ReadFile(const std::string& path);

// Debian's Python, which has numpy, scipy, statsmodels and torch.
inline const char* SystemPython() { return GRAFT_SYSTEM_PYTHON; }
inline std::string SourceDir() { return GRAFT_SOURCE_DIR; }
inline std::string BinaryDir() { return GRAFT_BINARY_DIR; }
// The graft-worker program the tests start (this build's unless CMake's GRAFT_TEST_WORKER says).
inline std::string WorkerBinary() { return GRAFT_WORKER_BINARY; }

}  // namespace graft::testing

#endif  // GRAFT_TESTS_TEST_UTIL_H_
