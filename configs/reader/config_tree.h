// A YAML document as a tree that remembers where every node came from (file:line:column, or
// the Nth --set override), keeps map entries in order and reports duplicate keys, which
// yaml-cpp's Node API would silently drop. Thread-safety: plain values; no shared state.
#ifndef GRAFT_CONFIGS_READER_CONFIG_TREE_H_
#define GRAFT_CONFIGS_READER_CONFIG_TREE_H_

#include <cstdint>
#include <string>
#include <utility>
#include <vector>

#include "absl/status/statusor.h"

namespace graft::config {

// Where a node was written. `source` is a file path or "--set #N"; line and column are 1-based.
struct Location {
  std::string source;
  int line = 0;
  int column = 0;

  // "FILE:LINE:COL" (or "--set #N:1:COL").
  std::string ToString() const;
  // The same place, `n` characters further on the same line.
  Location Advance(int n) const { return Location{source, line, column + n}; }
};

struct ConfigNode {
  enum class Kind { kNull, kScalar, kSequence, kMap };
  Kind kind = Kind::kNull;
  std::string scalar;  // kScalar
  bool quoted = false;  // kScalar written in quotes (so never a number or bool)
  Location loc;         // the node's first character (a quoted scalar: its opening quote)
  std::vector<ConfigNode> items;                              // kSequence
  std::vector<std::pair<ConfigNode, ConfigNode>> entries;     // kMap: (key, value), in order

  bool IsMap() const { return kind == Kind::kMap; }
  bool IsSequence() const { return kind == Kind::kSequence; }
  bool IsScalar() const { return kind == Kind::kScalar; }
  bool IsNull() const { return kind == Kind::kNull; }
  // The value for `key`, or nullptr. REQUIRES: IsMap().
  const ConfigNode* Find(const std::string& key) const;
  ConfigNode* FindMutable(const std::string& key);
  // A short description for messages: "a map", "a list", "'abc'", "nothing"; a scalar longer
  // than 80 bytes is cut, with its size.
  std::string Describe() const;
};

// Bounds of a parsed document: nodes (an alias counts as the nodes it copies, so aliases that
// expand exponentially are refused before they are copied) and levels of nesting.
inline constexpr int64_t kMaxYamlNodes = 200000;
inline constexpr int64_t kMaxYamlDepth = 64;

// Parses one YAML document. Errors (syntax, duplicate keys, more than one document, a NUL byte or
// invalid UTF-8, more than kMaxYamlNodes nodes or kMaxYamlDepth levels) come back as
// InvalidArgument "SOURCE:LINE:COL: message". `source` names the text in locations;
// `column_offset` shifts the reported columns (for --set values, which start after "key=").
absl::StatusOr<ConfigNode> ParseYaml(const std::string& text, const std::string& source,
                                     int column_offset = 0);

// Reads and parses a file; a missing file is NotFound naming it.
absl::StatusOr<ConfigNode> ParseYamlFile(const std::string& path);

// Applies one `key.path=value` override (the Nth, 1-based) to `root`: the value is parsed as
// YAML, missing maps on the path are created, numeric path segments index lists.
absl::Status ApplyOverride(ConfigNode& root, const std::string& assignment, int n);

// Shortest decimal text that reads back as the same double; whole numbers below 10^15 are
// written without an exponent (10, not 1e+01). For numbers written into config text.
std::string FormatDouble(double x);

// Writes the tree back as YAML (block style, keys in order).
std::string ToYaml(const ConfigNode& node);

}  // namespace graft::config

#endif  // GRAFT_CONFIGS_READER_CONFIG_TREE_H_
