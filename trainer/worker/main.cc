// graft-worker: trains and checks jobs. Flag parsing plus one call into the worker library.
#include <iostream>
#include <string>
#include <vector>

#include "CLI/CLI.hpp"
#include "trainer/worker/commands.h"

int main(int argc, char** argv) {
  CLI::App app{"graft-worker: trains networks to implement an algorithm (IIT) and measures IIA"};
  app.require_subcommand(1);

  std::string check_config;
  std::vector<std::string> check_sets;
  CLI::App* check = app.add_subcommand("check", "Validate a config and print a summary of the job");
  check->add_option("CONFIG", check_config, "YAML config file")->required();
  check->add_option("--set", check_sets, "Override a key: key.path=value (repeatable)")->take_all();

  try {
    app.parse(argc, argv);
  } catch (const CLI::ParseError& e) {
    return app.exit(e) == 0 ? 0 : graft::worker::kExitInvalidConfig;
  }
  if (check->parsed()) {
    return graft::worker::CheckCommand(check_config, check_sets, std::cout, std::cerr);
  }
  return graft::worker::kExitFailure;
}
