// libFuzzer target: the client's config file reader. The input is written to a temporary file
// named by GRAFT_CONFIG (through the getenv seam) and resolved with no flags. Promises checked:
// the result is OK, InvalidArgument or NotFound (a token_file that is not there), and a refusal
// of the file's contents names its place ("FILE:LINE:COL").
#include <unistd.h>

#include <cstddef>
#include <cstdint>
#include <cstdlib>
#include <fstream>
#include <string>

#include "client/settings.h"
#include "tests/fuzz/fuzz_util.h"

namespace {
std::string& ConfigPath() {
  static std::string path = [] {
    char dir[] = "/tmp/graft-client-fuzz-XXXXXX";
    if (mkdtemp(dir) == nullptr) graft::fuzz::Broken("mkdtemp failed");
    return std::string(dir) + "/client.yaml";
  }();
  return path;
}
}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const uint8_t* data, size_t size) {
  using namespace graft;
  const std::string& path = ConfigPath();
  {
    std::ofstream out(path, std::ios::binary | std::ios::trunc);
    out.write(reinterpret_cast<const char*>(data), static_cast<std::streamsize>(size));
  }
  client::SettingsSources sources;
  sources.getenv = [&](const char* name) -> const char* {
    if (std::string(name) == "GRAFT_CONFIG") return path.c_str();
    return nullptr;
  };
  auto settings = client::ResolveSettings(sources);
  if (!settings.ok()) {
    const absl::StatusCode code = settings.status().code();
    fuzz::Require(code == absl::StatusCode::kInvalidArgument || code == absl::StatusCode::kNotFound,
                  settings.status().ToString());
    const std::string m(settings.status().message());
    if (code == absl::StatusCode::kInvalidArgument) {
      fuzz::Require(m.rfind(path + ":", 0) == 0, "a refusal without its place: " + m);
    }
    return 0;
  }
  fuzz::Require(!settings->server.empty(), "no server after resolving");
  return 0;
}
