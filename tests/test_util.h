// Small helpers shared by graft's tests: status assertions, a scoped temporary directory,
// running a subprocess and capturing its output. Not thread-safe; use from test bodies.
#ifndef GRAFT_TESTS_TEST_UTIL_H_
#define GRAFT_TESTS_TEST_UTIL_H_

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

// Writes `contents` to `path`, replacing it. Fails the current test on error.
void WriteFile(const std::string& path, const std::string& contents);
std::string ReadFile(const std::string& path);

// Debian's Python, which has numpy, scipy, statsmodels and torch.
inline const char* SystemPython() { return GRAFT_SYSTEM_PYTHON; }
inline std::string SourceDir() { return GRAFT_SOURCE_DIR; }
inline std::string BinaryDir() { return GRAFT_BINARY_DIR; }

}  // namespace graft::testing

#endif  // GRAFT_TESTS_TEST_UTIL_H_
