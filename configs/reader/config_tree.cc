#include "configs/reader/config_tree.h"

#include <algorithm>
#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <fstream>
#include <map>
#include <memory>
#include <sstream>

#include "absl/status/status.h"
#include "absl/strings/str_cat.h"
#include "absl/strings/str_join.h"
#include "absl/strings/str_split.h"
#include "yaml-cpp/eventhandler.h"
#include "yaml-cpp/yaml.h"

namespace graft::config {
namespace {

// Thrown out of yaml-cpp's parser by TreeBuilder to stop at once (nesting or expansion past the
// bounds); the status is already recorded.
struct StopParsing {};

// The first byte that is not valid UTF-8, or a NUL: "LINE:COL: what", or "" for good text.
// Columns count characters.
std::string FirstBadByte(const std::string& text, int column_offset) {
  int line = 1, column = 1;
  const auto* p = reinterpret_cast<const unsigned char*>(text.data());
  const size_t n = text.size();
  for (size_t i = 0; i < n;) {
    const unsigned char c = p[i];
    auto at = [&] { return absl::StrCat(line, ":", column + column_offset, ": "); };
    if (c == 0) return absl::StrCat(at(), "a NUL byte; a config is UTF-8 text");
    size_t len = c < 0x80 ? 1 : (c >> 5) == 0x6 ? 2 : (c >> 4) == 0xe ? 3 : (c >> 3) == 0x1e ? 4 : 0;
    bool ok = len > 0 && i + len <= n;
    for (size_t k = 1; ok && k < len; ++k) ok = (p[i + k] & 0xc0) == 0x80;
    if (ok && len > 1) {
      // Overlong forms, UTF-16 surrogates and code points past U+10FFFF are not UTF-8.
      uint32_t cp = c & (0xff >> (len + 1));
      for (size_t k = 1; k < len; ++k) cp = (cp << 6) | (p[i + k] & 0x3f);
      const uint32_t min[] = {0, 0, 0x80, 0x800, 0x10000};
      ok = cp >= min[len] && cp <= 0x10ffff && !(cp >= 0xd800 && cp <= 0xdfff);
    }
    if (!ok) {
      char hex[8];
      std::snprintf(hex, sizeof(hex), "0x%02X", c);
      return absl::StrCat(at(), "byte ", hex, " is not valid UTF-8; a config is UTF-8 text");
    }
    if (c == '\n') {
      ++line;
      column = 1;
    } else {
      ++column;
    }
    i += len;
  }
  return "";
}

// Builds a ConfigNode tree from yaml-cpp's parse events, within kMaxYamlNodes nodes (each alias
// counts as the nodes it copies) and kMaxYamlDepth levels of nesting.
class TreeBuilder : public YAML::EventHandler {
 public:
  TreeBuilder(std::string source, int column_offset)
      : source_(std::move(source)), column_offset_(column_offset) {}

  void OnDocumentStart(const YAML::Mark&) override { ++documents_; }
  void OnDocumentEnd() override {}

  void OnNull(const YAML::Mark& mark, YAML::anchor_t anchor) override {
    Count(mark, 1, 1);
    ConfigNode n;
    n.kind = ConfigNode::Kind::kNull;
    n.loc = Loc(mark);
    Add(std::move(n), anchor, Shape{1, 1});
  }
  void OnAlias(const YAML::Mark& mark, YAML::anchor_t anchor) override {
    auto it = anchors_.find(anchor);
    if (it == anchors_.end()) {
      Fail(mark, "alias to an unknown anchor");
      return;
    }
    // Checked before copying: an alias bomb stops here, not after the copies are made.
    Count(mark, it->second.shape.nodes, it->second.shape.height);
    ConfigNode copy = it->second.node;
    copy.loc = Loc(mark);
    Add(std::move(copy), 0, it->second.shape);
  }
  void OnScalar(const YAML::Mark& mark, const std::string& tag, YAML::anchor_t anchor,
                const std::string& value) override {
    if (!tag.empty() && tag != "?" && tag != "!") {
      // `careful: !fragile` reads as the YAML tag "!fragile", not as an expression.
      Fail(mark, absl::StrCat("YAML tag '", tag, "' is not supported; an expression starting with '!' must be "
                              "quoted, e.g. \"!fragile\""));
      return;
    }
    Count(mark, 1, 1);
    ConfigNode n;
    n.kind = ConfigNode::Kind::kScalar;
    n.scalar = value;
    n.quoted = (tag == "!");
    n.loc = Loc(mark);
    if (!n.quoted && (value == "~" || value == "null" || value == "Null" || value == "NULL")) {
      n.kind = ConfigNode::Kind::kNull;
      n.scalar.clear();
    }
    Add(std::move(n), anchor, Shape{1, 1});
  }
  void OnSequenceStart(const YAML::Mark& mark, const std::string& tag, YAML::anchor_t anchor,
                       YAML::EmitterStyle::value) override {
    CheckTag(mark, tag);
    Count(mark, 1, 1);
    ConfigNode n;
    n.kind = ConfigNode::Kind::kSequence;
    n.loc = Loc(mark);
    stack_.push_back(Open{std::move(n), anchor, {}, false, nodes_ - 1, 1});
  }
  void OnSequenceEnd() override { Close(); }
  void OnMapStart(const YAML::Mark& mark, const std::string& tag, YAML::anchor_t anchor,
                  YAML::EmitterStyle::value) override {
    CheckTag(mark, tag);
    Count(mark, 1, 1);
    ConfigNode n;
    n.kind = ConfigNode::Kind::kMap;
    n.loc = Loc(mark);
    stack_.push_back(Open{std::move(n), anchor, {}, false, nodes_ - 1, 1});
  }
  void OnMapEnd() override { Close(); }

  absl::Status status() const { return status_; }
  int documents() const { return documents_; }
  ConfigNode TakeRoot() { return std::move(root_); }
  bool has_root() const { return has_root_; }

 private:
  // A subtree's size: its nodes (with the copies its aliases made) and its height.
  struct Shape {
    int64_t nodes = 1;
    int height = 1;
  };
  struct Anchored {
    ConfigNode node;
    Shape shape;
  };
  struct Open {
    ConfigNode node;
    YAML::anchor_t anchor;
    ConfigNode pending_key;
    bool has_key;
    int64_t nodes_before;  // nodes_ before this node was opened
    int height;            // 1 + the tallest child so far
  };

  // Counts `nodes` more nodes of a subtree `height` tall starting at the current depth; past the
  // bounds records the error and stops the parser.
  void Count(const YAML::Mark& mark, int64_t nodes, int height) {
    nodes_ += nodes;
    if (nodes_ > kMaxYamlNodes) {
      Fail(mark, absl::StrCat("the YAML makes more than ", kMaxYamlNodes, " nodes (each alias counting the nodes it "
                              "copies); a config holds at most ", kMaxYamlNodes, ", so this is refused (aliases "
                              "that expand exponentially?)"));
      throw StopParsing{};
    }
    if (static_cast<int64_t>(stack_.size()) + height > kMaxYamlDepth) {
      Fail(mark, absl::StrCat("the YAML nests deeper than ", kMaxYamlDepth, " levels; a config nests at most ",
                              kMaxYamlDepth));
      throw StopParsing{};
    }
  }

  void CheckTag(const YAML::Mark& mark, const std::string& tag) {
    if (!tag.empty() && tag != "?" && tag != "!") {
      Fail(mark, absl::StrCat("YAML tag '", tag, "' is not supported in a graft config"));
    }
  }
  Location Loc(const YAML::Mark& mark) const {
    return Location{source_, mark.line + 1, mark.column + 1 + column_offset_};
  }
  void Fail(const YAML::Mark& mark, const std::string& message) {
    if (status_.ok()) status_ = absl::InvalidArgumentError(absl::StrCat(Loc(mark).ToString(), ": ", message));
  }
  void FailAt(const Location& loc, const std::string& message) {
    if (status_.ok()) status_ = absl::InvalidArgumentError(absl::StrCat(loc.ToString(), ": ", message));
  }

  void Add(ConfigNode n, YAML::anchor_t anchor, Shape shape) {
    if (anchor != 0) anchors_[anchor] = Anchored{n, shape};
    if (!stack_.empty()) stack_.back().height = std::max(stack_.back().height, shape.height + 1);
    if (stack_.empty()) {
      root_ = std::move(n);
      has_root_ = true;
      return;
    }
    Open& top = stack_.back();
    if (top.node.kind == ConfigNode::Kind::kSequence) {
      top.node.items.push_back(std::move(n));
      return;
    }
    if (!top.has_key) {
      if (n.kind != ConfigNode::Kind::kScalar) {
        FailAt(n.loc, "map keys must be plain names");
      }
      top.pending_key = std::move(n);
      top.has_key = true;
      return;
    }
    // yaml-cpp's Node API keeps the first of two equal keys silently: refuse them here.
    for (const auto& [k, v] : top.node.entries) {
      if (k.scalar == top.pending_key.scalar) {
        FailAt(top.pending_key.loc,
               absl::StrCat("duplicate key '", k.scalar, "' (first written at line ", k.loc.line,
                            "); remove one of them"));
      }
    }
    top.node.entries.emplace_back(std::move(top.pending_key), std::move(n));
    top.pending_key = ConfigNode();
    top.has_key = false;
  }
  void Close() {
    Open top = std::move(stack_.back());
    stack_.pop_back();
    Add(std::move(top.node), top.anchor, Shape{nodes_ - top.nodes_before, top.height});
  }

  std::string source_;
  int column_offset_;
  std::vector<Open> stack_;
  std::map<YAML::anchor_t, Anchored> anchors_;
  int64_t nodes_ = 0;  // made so far, alias copies included
  ConfigNode root_;
  bool has_root_ = false;
  int documents_ = 0;
  absl::Status status_;
};

// A scalar as YAML text: quoted scalars (and any text YAML would misread) are written
// double-quoted with escapes, by yaml-cpp's emitter.
std::string QuoteIfNeeded(const ConfigNode& n) {
  YAML::Emitter e;
  if (n.quoted) e << YAML::DoubleQuoted;
  e << n.scalar;
  return e.c_str();
}

void Emit(const ConfigNode& n, int indent, std::ostringstream& out, bool inline_start);

void EmitFlow(const ConfigNode& n, std::ostringstream& out) {
  switch (n.kind) {
    case ConfigNode::Kind::kNull: out << "null"; break;
    case ConfigNode::Kind::kScalar: out << QuoteIfNeeded(n); break;
    case ConfigNode::Kind::kSequence: {
      out << "[";
      for (size_t i = 0; i < n.items.size(); ++i) {
        if (i) out << ", ";
        EmitFlow(n.items[i], out);
      }
      out << "]";
      break;
    }
    case ConfigNode::Kind::kMap: {
      out << "{";
      for (size_t i = 0; i < n.entries.size(); ++i) {
        if (i) out << ", ";
        out << n.entries[i].first.scalar << ": ";
        EmitFlow(n.entries[i].second, out);
      }
      out << "}";
      break;
    }
  }
}

bool IsFlat(const ConfigNode& n) {
  if (n.kind == ConfigNode::Kind::kSequence) {
    for (const auto& i : n.items) {
      if (i.kind == ConfigNode::Kind::kMap) return false;
      if (i.kind == ConfigNode::Kind::kSequence && !IsFlat(i)) return false;
    }
    return true;
  }
  if (n.kind == ConfigNode::Kind::kMap) {
    for (const auto& [k, v] : n.entries) {
      if (v.kind == ConfigNode::Kind::kMap || v.kind == ConfigNode::Kind::kSequence) return false;
    }
    return n.entries.size() <= 4;
  }
  return true;
}

void Emit(const ConfigNode& n, int indent, std::ostringstream& out, bool) {
  const std::string pad(indent, ' ');
  for (const auto& [k, v] : n.entries) {
    out << pad << k.scalar << ":";
    if (v.kind == ConfigNode::Kind::kMap && !v.entries.empty() && !IsFlat(v)) {
      out << "\n";
      Emit(v, indent + 2, out, false);
    } else if (v.kind == ConfigNode::Kind::kMap && !v.entries.empty() && indent == 0) {
      out << "\n";
      Emit(v, indent + 2, out, false);
    } else {
      out << " ";
      EmitFlow(v, out);
      out << "\n";
    }
  }
}

}  // namespace

// Shortest decimal text that reads back as the same double; whole numbers below 10^15 are
// written without an exponent (10, not 1e+01).
std::string FormatDouble(double x) {
  char buf[64];
  if (x == std::floor(x) && std::fabs(x) < 1e15) {
    std::snprintf(buf, sizeof(buf), "%.0f", x);
    return buf;
  }
  for (int p = 1; p <= 17; ++p) {
    std::snprintf(buf, sizeof(buf), "%.*g", p, x);
    if (std::strtod(buf, nullptr) == x) break;
  }
  return buf;
}

std::string Location::ToString() const { return absl::StrCat(source, ":", line, ":", column); }

const ConfigNode* ConfigNode::Find(const std::string& key) const {
  for (const auto& [k, v] : entries) {
    if (k.scalar == key) return &v;
  }
  return nullptr;
}

ConfigNode* ConfigNode::FindMutable(const std::string& key) {
  for (auto& [k, v] : entries) {
    if (k.scalar == key) return &v;
  }
  return nullptr;
}

std::string ConfigNode::Describe() const {
  switch (kind) {
    case Kind::kNull: return "nothing";
    case Kind::kScalar: {
      if (scalar.size() <= 80) return absl::StrCat("'", scalar, "'");
      size_t cut = 72;  // not inside a UTF-8 sequence
      while (cut > 0 && (static_cast<unsigned char>(scalar[cut]) & 0xc0) == 0x80) --cut;
      return absl::StrCat("'", scalar.substr(0, cut), "...' (", scalar.size(), " bytes)");
    }
    case Kind::kSequence: return "a list";
    case Kind::kMap: return "a map";
  }
  return "?";
}

absl::StatusOr<ConfigNode> ParseYaml(const std::string& text, const std::string& source,
                                     int column_offset) {
  // yaml-cpp guesses UTF-16 or UTF-32 from NUL bytes and passes invalid UTF-8 through: refuse
  // both here, where the place can still be named.
  if (const std::string bad = FirstBadByte(text, column_offset); !bad.empty()) {
    return absl::InvalidArgumentError(absl::StrCat(source, ":", bad));
  }
  std::istringstream in(text);
  TreeBuilder builder(source, column_offset);
  try {
    YAML::Parser parser(in);
    while (parser.HandleNextDocument(builder)) {
      if (!builder.status().ok()) return builder.status();
      if (builder.documents() > 1) {
        return absl::InvalidArgumentError(
            absl::StrCat(source, ": holds more than one YAML document; one config per file"));
      }
    }
  } catch (const StopParsing&) {
    return builder.status();
  } catch (const YAML::Exception& e) {
    return absl::InvalidArgumentError(absl::StrCat(source, ":", e.mark.line + 1, ":",
                                                   e.mark.column + 1 + column_offset,
                                                   ": YAML syntax: ", e.msg));
  }
  if (!builder.status().ok()) return builder.status();
  if (!builder.has_root()) {
    ConfigNode empty;
    empty.loc = Location{source, 1, 1 + column_offset};
    return empty;
  }
  return builder.TakeRoot();
}

absl::StatusOr<ConfigNode> ParseYamlFile(const std::string& path) {
  std::ifstream in(path, std::ios::binary);
  if (!in.good()) return absl::NotFoundError(absl::StrCat(path, ": cannot open the file"));
  std::stringstream ss;
  ss << in.rdbuf();
  return ParseYaml(ss.str(), path);
}

absl::Status ApplyOverride(ConfigNode& root, const std::string& assignment, int n) {
  const std::string source = absl::StrCat("--set #", n);
  const size_t eq = assignment.find('=');
  if (eq == std::string::npos || eq == 0) {
    return absl::InvalidArgumentError(absl::StrCat(
        source, ":1:1: expected key.path=value, got '", assignment, "'"));
  }
  const std::string path = assignment.substr(0, eq);
  auto value = ParseYaml(assignment.substr(eq + 1), source, static_cast<int>(eq + 1));
  if (!value.ok()) return value.status();
  if (root.kind == ConfigNode::Kind::kNull) {
    root.kind = ConfigNode::Kind::kMap;
  }
  ConfigNode* node = &root;
  int column = 1;
  std::vector<std::string> parts = absl::StrSplit(path, '.');
  for (size_t i = 0; i < parts.size(); ++i) {
    const std::string& part = parts[i];
    const Location loc{source, 1, column};
    if (part.empty()) {
      return absl::InvalidArgumentError(absl::StrCat(loc.ToString(), ": empty key in '", path, "'"));
    }
    const bool last = i + 1 == parts.size();
    ConfigNode* next = nullptr;
    if (node->kind == ConfigNode::Kind::kSequence) {
      char* end = nullptr;
      long idx = std::strtol(part.c_str(), &end, 10);
      if (*end != '\0' || idx < 0 || static_cast<size_t>(idx) >= node->items.size()) {
        return absl::InvalidArgumentError(absl::StrCat(
            loc.ToString(), ": '", part, "' is not an index of the list at '",
            absl::StrJoin(std::vector<std::string>(parts.begin(), parts.begin() + i), "."),
            "' (it has ", node->items.size(), " items)"));
      }
      next = &node->items[idx];
    } else {
      if (node->kind != ConfigNode::Kind::kMap) {
        if (node->kind == ConfigNode::Kind::kNull) {
          node->kind = ConfigNode::Kind::kMap;
        } else {
          return absl::InvalidArgumentError(absl::StrCat(
              loc.ToString(), ": cannot set '", part, "' inside ",
              absl::StrJoin(std::vector<std::string>(parts.begin(), parts.begin() + i), "."),
              ", which is ", node->Describe(), ", not a map"));
        }
      }
      next = node->FindMutable(part);
      if (next == nullptr) {
        ConfigNode key;
        key.kind = ConfigNode::Kind::kScalar;
        key.scalar = part;
        key.loc = loc;
        ConfigNode empty;
        empty.loc = loc;
        node->entries.emplace_back(std::move(key), std::move(empty));
        next = &node->entries.back().second;
      } else {
        // Errors about this key now point at the override.
        for (auto& [k, v] : node->entries) {
          if (&v == next) k.loc = loc;
        }
      }
    }
    if (last) {
      *next = std::move(*value);
    }
    node = next;
    column += static_cast<int>(part.size()) + 1;
  }
  return absl::OkStatus();
}

std::string ToYaml(const ConfigNode& node) {
  std::ostringstream out;
  if (node.kind == ConfigNode::Kind::kMap) {
    Emit(node, 0, out, false);
  } else {
    EmitFlow(node, out);
    out << "\n";
  }
  return out.str();
}

}  // namespace graft::config
