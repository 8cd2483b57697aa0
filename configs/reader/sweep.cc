#include "configs/reader/sweep.h"

#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <map>
#include <set>
#include <sstream>

#include "absl/status/status.h"
#include "absl/strings/str_cat.h"
#include "absl/strings/str_join.h"
#include "absl/strings/str_split.h"
#include "configs/reader/suggest.h"
#include "trainer/causal/rng.h"

namespace graft::config {
namespace {

// One axis of the product: each point sets several keys at once.
struct Axis {
  std::vector<std::string> keys;                  // dotted paths
  std::vector<std::vector<ConfigNode>> points;    // points[i][k] is the value of keys[k]
};

// "; did you mean 'x'?" when a valid name is near `word`, else "; valid ...: a, b, c".
std::string Hint(const std::string& word, const std::vector<std::string>& valid, const char* what) {
  const std::string near = Nearest(word, valid);
  if (!near.empty()) return absl::StrCat("; did you mean '", near, "'?");
  return absl::StrCat("; valid ", what, ": ", absl::StrJoin(valid, ", "));
}

ConfigNode Scalar(const std::string& s, const Location& loc) {
  ConfigNode n;
  n.kind = ConfigNode::Kind::kScalar;
  n.scalar = s;
  n.loc = loc;
  return n;
}


// Value text for a job name: numbers in their shortest form (0.0 -> 0), lists in flow style.
std::string NameText(const ConfigNode& v) {
  if (v.IsScalar()) {
    char* end = nullptr;
    const double x = std::strtod(v.scalar.c_str(), &end);
    if (!v.quoted && !v.scalar.empty() && *end == '\0' && std::isfinite(x)) {
      char buf[32];
      std::snprintf(buf, sizeof(buf), "%.3g", x);
      return buf;
    }
    return v.scalar;
  }
  std::string text = ToYaml(v);
  while (!text.empty() && text.back() == '\n') text.pop_back();
  std::string out;
  for (char c : text) {
    if (c != ' ') out.push_back(c);
  }
  return out;
}

// Value text for a `--set key=value` argument: the value exactly as YAML (a scalar as written or
// drawn, a quoted one in single quotes, lists and maps in flow style without spaces).
std::string OverrideText(const ConfigNode& v) {
  if (v.IsScalar()) {
    if (!v.quoted) return v.scalar;
    std::string out = "'";
    for (char c : v.scalar) {
      out.push_back(c);
      if (c == '\'') out.push_back('\'');
    }
    return out + "'";
  }
  return NameText(v);
}

// Sets `path` (dotted; numeric segments index lists) in `root` to `value`.
absl::Status SetPath(ConfigNode& root, const std::string& path, const ConfigNode& value, const Location& where) {
  ConfigNode* node = &root;
  std::vector<std::string> parts = absl::StrSplit(path, '.');
  for (size_t i = 0; i < parts.size(); ++i) {
    const std::string& part = parts[i];
    ConfigNode* next = nullptr;
    if (node->IsSequence()) {
      char* end = nullptr;
      const long idx = std::strtol(part.c_str(), &end, 10);
      if (*end != '\0' || idx < 0 || static_cast<size_t>(idx) >= node->items.size()) {
        return absl::InvalidArgumentError(absl::StrCat(where.ToString(), ": sweep key '", path, "': '", part,
                                                       "' is not an index of that list"));
      }
      next = &node->items[idx];
    } else {
      if (node->IsNull()) node->kind = ConfigNode::Kind::kMap;
      if (!node->IsMap()) {
        return absl::InvalidArgumentError(absl::StrCat(where.ToString(), ": sweep key '", path, "': '", part,
                                                       "' is inside ", node->Describe(), ", not a map"));
      }
      next = node->FindMutable(part);
      if (next == nullptr) {
        ConfigNode empty;
        empty.loc = where;
        node->entries.emplace_back(Scalar(part, where), empty);
        next = &node->entries.back().second;
      }
    }
    node = next;
  }
  *node = value;
  return absl::OkStatus();
}

absl::StatusOr<std::vector<ConfigNode>> ValueList(const ConfigNode& v, const std::string& what) {
  if (!v.IsSequence() || v.items.empty()) {
    return absl::InvalidArgumentError(
        absl::StrCat(v.loc.ToString(), ": ", what, ": expected a non-empty list of values, got ", v.Describe()));
  }
  return v.items;
}

absl::StatusOr<std::pair<double, double>> Bounds(const ConfigNode& v, const std::string& what, bool positive) {
  if (!v.IsSequence() || v.items.size() != 2 || !v.items[0].IsScalar() || !v.items[1].IsScalar()) {
    return absl::InvalidArgumentError(absl::StrCat(v.loc.ToString(), ": ", what, ": expected [low, high]"));
  }
  char* e1 = nullptr;
  char* e2 = nullptr;
  const double lo = std::strtod(v.items[0].scalar.c_str(), &e1);
  const double hi = std::strtod(v.items[1].scalar.c_str(), &e2);
  if (*e1 != '\0' || *e2 != '\0' || !(lo <= hi) || (positive && lo <= 0)) {
    return absl::InvalidArgumentError(absl::StrCat(v.loc.ToString(), ": ", what, ": expected [low, high] with low <= high",
                                                   positive ? " and low > 0" : ""));
  }
  return std::make_pair(lo, hi);
}

absl::StatusOr<std::vector<Axis>> ReadAxes(const ConfigNode& sweep, std::vector<ConfigNode>* seeds) {
  std::vector<Axis> axes;
  for (const auto& [k, v] : sweep.entries) {
    const std::string key = k.scalar;
    if (key == "grid") {
      if (!v.IsMap()) return absl::InvalidArgumentError(absl::StrCat(v.loc.ToString(), ": sweep.grid: expected a map from key to values"));
      for (const auto& [gk, gv] : v.entries) {
        auto values = ValueList(gv, "sweep.grid." + gk.scalar);
        if (!values.ok()) return values.status();
        Axis axis;
        axis.keys = {gk.scalar};
        for (const auto& x : *values) axis.points.push_back({x});
        axes.push_back(std::move(axis));
      }
    } else if (key == "together") {
      if (!v.IsSequence()) {
        return absl::InvalidArgumentError(absl::StrCat(v.loc.ToString(), ": sweep.together: expected a list of maps from key to values"));
      }
      for (const auto& group : v.items) {
        if (!group.IsMap() || group.entries.empty()) {
          return absl::InvalidArgumentError(absl::StrCat(group.loc.ToString(), ": sweep.together: each entry is a map from key to values"));
        }
        Axis axis;
        size_t n = 0;
        for (const auto& [gk, gv] : group.entries) {
          auto values = ValueList(gv, "sweep.together." + gk.scalar);
          if (!values.ok()) return values.status();
          if (axis.keys.empty()) {
            n = values->size();
            axis.points.resize(n);
          } else if (values->size() != n) {
            return absl::InvalidArgumentError(absl::StrCat(gv.loc.ToString(), ": sweep.together: '", gk.scalar, "' has ",
                                                           values->size(), " values but '", axis.keys.front(), "' has ", n,
                                                           "; keys that vary together need the same number of values"));
          }
          axis.keys.push_back(gk.scalar);
          for (size_t i = 0; i < n; ++i) axis.points[i].push_back((*values)[i]);
        }
        axes.push_back(std::move(axis));
      }
    } else if (key == "sample") {
      if (!v.IsMap()) return absl::InvalidArgumentError(absl::StrCat(v.loc.ToString(), ": sweep.sample: expected {count, seed, params}"));
      int64_t count = 0, seed = 0;
      const ConfigNode* params = nullptr;
      for (const auto& [sk, sv] : v.entries) {
        if (sk.scalar == "count" || sk.scalar == "seed") {
          char* end = nullptr;
          const long long x = sv.IsScalar() ? std::strtoll(sv.scalar.c_str(), &end, 10) : -1;
          if (!sv.IsScalar() || *end != '\0' || x < (sk.scalar == "count" ? 1 : 0)) {
            return absl::InvalidArgumentError(absl::StrCat(sv.loc.ToString(), ": sweep.sample.", sk.scalar,
                                                           ": expected a whole number", sk.scalar == "count" ? " >= 1" : " >= 0"));
          }
          (sk.scalar == "count" ? count : seed) = x;
        } else if (sk.scalar == "params") {
          params = &sv;
        } else {
          return absl::InvalidArgumentError(absl::StrCat(sk.loc.ToString(), ": unknown key '", sk.scalar,
                                                         "' in 'sweep.sample'",
                                                         Hint(sk.scalar, {"count", "seed", "params"}, "keys")));
        }
      }
      if (count <= 0 || params == nullptr || !params->IsMap() || params->entries.empty()) {
        return absl::InvalidArgumentError(absl::StrCat(v.loc.ToString(), ": sweep.sample: needs count and params"));
      }
      Axis axis;
      causal::Rng rng(static_cast<uint64_t>(seed), 0x5A3);
      axis.points.resize(count);
      for (const auto& [pk, pv] : params->entries) {
        axis.keys.push_back(pk.scalar);
        const std::string what = "sweep.sample.params." + pk.scalar;
        if (!pv.IsMap() || pv.entries.size() != 1) {
          return absl::InvalidArgumentError(absl::StrCat(pv.loc.ToString(), ": ", what,
                                                         ": expected one of {log_between: [a, b]}, {between: [a, b]}, "
                                                         "{whole_between: [a, b]}, {one_of: [...]}"));
        }
        const std::string kind = pv.entries[0].first.scalar;
        const ConfigNode& arg = pv.entries[0].second;
        for (int64_t i = 0; i < count; ++i) {
          ConfigNode value;
          if (kind == "one_of") {
            auto values = ValueList(arg, what + ".one_of");
            if (!values.ok()) return values.status();
            value = (*values)[rng.Uniform(values->size())];
          } else if (kind == "between" || kind == "log_between" || kind == "whole_between") {
            auto b = Bounds(arg, what + "." + kind, kind == "log_between");
            if (!b.ok()) return b.status();
            const double u = rng.UniformDouble();
            double x;
            if (kind == "between") {
              x = b->first + u * (b->second - b->first);
              value = Scalar(FormatDouble(x), arg.loc);
            } else if (kind == "log_between") {
              x = std::exp(std::log(b->first) + u * (std::log(b->second) - std::log(b->first)));
              value = Scalar(FormatDouble(x), arg.loc);
            } else {
              const int64_t lo = static_cast<int64_t>(std::ceil(b->first));
              const int64_t hi = static_cast<int64_t>(std::floor(b->second));
              if (hi < lo) return absl::InvalidArgumentError(absl::StrCat(arg.loc.ToString(), ": ", what, ": no whole number in range"));
              value = Scalar(absl::StrCat(lo + static_cast<int64_t>(rng.Uniform(static_cast<uint64_t>(hi - lo + 1)))), arg.loc);
            }
          } else {
            return absl::InvalidArgumentError(
                absl::StrCat(pv.entries[0].first.loc.ToString(), ": ", what, ": unknown draw '", kind, "'",
                             Hint(kind, {"between", "log_between", "whole_between", "one_of"}, "draws")));
          }
          value.loc = arg.loc;
          axis.points[i].push_back(value);
        }
      }
      axes.push_back(std::move(axis));
    } else if (key == "seeds") {
      auto values = ValueList(v, "sweep.seeds");
      if (!values.ok()) return values.status();
      *seeds = *values;
    } else {
      return absl::InvalidArgumentError(absl::StrCat(k.loc.ToString(), ": unknown key '", key, "' in 'sweep'",
                                                     Hint(key, {"grid", "together", "sample", "seeds"}, "keys")));
    }
  }
  return axes;
}

std::string ShortKey(const std::string& path, const std::set<std::string>& clashing) {
  std::vector<std::string> parts = absl::StrSplit(path, '.');
  if (!clashing.count(parts.back()) || parts.size() < 2) return parts.back();
  return parts[parts.size() - 2] + "." + parts.back();
}

}  // namespace

absl::StatusOr<SweepPlan> ExpandConfig(const ConfigNode& root, int64_t max_jobs, const SpecLimits& limits) {
  SweepPlan plan;
  const ConfigNode* sweep = root.IsMap() ? root.Find("sweep") : nullptr;
  if (sweep != nullptr && sweep->IsNull()) {
    // `sweep: null` turns the sweep off: the config without it is one job.
    ConfigNode lone = root;
    for (auto it = lone.entries.begin(); it != lone.entries.end(); ++it) {
      if (it->first.scalar == "sweep") {
        lone.entries.erase(it);
        break;
      }
    }
    return ExpandConfig(lone, max_jobs, limits);
  }
  if (sweep == nullptr) {
    auto job = ResolveTree(root, limits);
    if (!job.ok()) return job.status();
    PlannedJob p;
    p.name = job->spec.name;
    p.job = std::move(*job);
    plan.jobs.push_back(std::move(p));
    return plan;
  }
  plan.is_sweep = true;
  if (!sweep->IsMap() || sweep->entries.empty()) {
    return absl::InvalidArgumentError(absl::StrCat(sweep->loc.ToString(), ": sweep: expected a map with grid, together, sample or seeds"));
  }
  std::vector<ConfigNode> seeds;
  auto axes = ReadAxes(*sweep, &seeds);
  if (!axes.ok()) return axes.status();
  // The base config without the sweep block.
  ConfigNode base = root;
  for (auto it = base.entries.begin(); it != base.entries.end(); ++it) {
    if (it->first.scalar == "sweep") {
      base.entries.erase(it);
      break;
    }
  }
  int64_t total = seeds.empty() ? 1 : static_cast<int64_t>(seeds.size());
  for (const Axis& a : *axes) {
    total *= static_cast<int64_t>(a.points.size());
    if (total > max_jobs) break;
  }
  if (total > max_jobs) {
    return absl::ResourceExhaustedError(absl::StrCat(sweep->loc.ToString(), ": the sweep makes more than ", max_jobs,
                                                     " jobs, the most this coordinator accepts in one sweep (max_sweep_jobs); split it"));
  }
  // Short names for keys; a last segment shared by keys that take different values gets its parent.
  std::map<std::string, std::set<std::string>> by_last;
  for (const Axis& a : *axes) {
    for (const auto& k : a.keys) by_last[std::vector<std::string>(absl::StrSplit(k, '.')).back()].insert(k);
  }
  std::set<std::string> clashing;
  {
    // Keys of one `together` axis with the same last segment and the same values share a name.
    for (const auto& [last, keys] : by_last) {
      if (keys.size() < 2) continue;
      bool same = true;
      for (const Axis& b : *axes) {
        std::vector<size_t> idx;
        for (size_t k = 0; k < b.keys.size(); ++k) {
          if (keys.count(b.keys[k])) idx.push_back(k);
        }
        if (idx.empty()) continue;
        if (idx.size() != keys.size()) same = false;
        for (const auto& point : b.points) {
          for (size_t j = 1; j < idx.size(); ++j) {
            if (NameText(point[idx[j]]) != NameText(point[idx[0]])) same = false;
          }
        }
      }
      if (!same) clashing.insert(last);
    }
  }
  // As for one job: the config's `name`, else the file's name without its extension.
  const std::string base_name = [&] {
    const ConfigNode* n = base.Find("name");
    if (n != nullptr && n->IsScalar() && !n->scalar.empty()) return n->scalar;
    const std::string stem = std::filesystem::path(root.loc.source).stem().string();
    return stem.empty() ? std::string("sweep") : stem;
  }();
  std::vector<size_t> index(axes->size(), 0);
  const size_t num_seeds = seeds.empty() ? 1 : seeds.size();
  std::set<std::string> names;
  int64_t k = 0;
  for (;;) {
    for (size_t s = 0; s < num_seeds; ++s) {
      ++k;
      ConfigNode tree = base;
      PlannedJob p;
      std::vector<std::string> parts;
      std::set<std::string> named;
      for (size_t a = 0; a < axes->size(); ++a) {
        const Axis& axis = (*axes)[a];
        for (size_t j = 0; j < axis.keys.size(); ++j) {
          const ConfigNode& value = axis.points[index[a]][j];
          absl::Status st = SetPath(tree, axis.keys[j], value, value.loc);
          if (!st.ok()) return st;
          p.varied.emplace_back(axis.keys[j], NameText(value));
          p.overrides.push_back(absl::StrCat(axis.keys[j], "=", OverrideText(value)));
          const std::string part = absl::StrCat(ShortKey(axis.keys[j], clashing), "=", NameText(value));
          if (named.insert(part).second) parts.push_back(part);
        }
      }
      std::string name = base_name;
      if (!parts.empty()) absl::StrAppend(&name, "/", absl::StrJoin(parts, ","));
      if (!seeds.empty()) {
        absl::Status st = SetPath(tree, "seed", seeds[s], seeds[s].loc);
        if (!st.ok()) return st;
        p.varied.emplace_back("seed", NameText(seeds[s]));
        p.overrides.push_back(absl::StrCat("seed=", OverrideText(seeds[s])));
        absl::StrAppend(&name, "/seed=", NameText(seeds[s]));
      }
      if (!names.insert(name).second) absl::StrAppend(&name, "#", k);
      ConfigNode name_node = Scalar(name, base.loc);
      name_node.quoted = true;
      absl::Status st = SetPath(tree, "name", name_node, base.loc);
      if (!st.ok()) return st;
      auto job = ResolveTree(tree, limits);
      if (!job.ok()) {
        std::vector<std::string> settings;
        for (const auto& [key, value] : p.varied) settings.push_back(absl::StrCat(key, "=", value));
        return absl::InvalidArgumentError(absl::StrCat("sweep combination ", k, " of ", total, " (",
                                                       absl::StrJoin(settings, ", "), ") is invalid, so the sweep is "
                                                       "refused and nothing was stored:\n",
                                                       job.status().message()));
      }
      p.name = name;
      p.job = std::move(*job);
      plan.jobs.push_back(std::move(p));
    }
    // Next grid point: the last axis fastest.
    int a = static_cast<int>(axes->size()) - 1;
    while (a >= 0) {
      if (++index[a] < (*axes)[a].points.size()) break;
      index[a] = 0;
      --a;
    }
    if (a < 0) break;
  }
  return plan;
}

absl::StatusOr<SweepPlan> PlanFromText(const std::string& text, const std::string& source,
                                       const std::vector<std::string>& overrides, int64_t max_jobs,
                                       const SpecLimits& limits) {
  auto tree = ParseYaml(text, source);
  if (!tree.ok()) return tree.status();
  for (size_t i = 0; i < overrides.size(); ++i) {
    absl::Status st = ApplyOverride(*tree, overrides[i], static_cast<int>(i + 1));
    if (!st.ok()) return st;
  }
  return ExpandConfig(*tree, max_jobs, limits);
}

std::string SummarizePlan(const SweepPlan& plan) {
  std::ostringstream out;
  out << "sweep of " << plan.jobs.size() << " jobs:\n";
  for (const auto& j : plan.jobs) out << "  " << j.name << "\n";
  return out.str();
}

absl::StatusOr<std::string> CheckFile(const std::string& path, const std::vector<std::string>& overrides,
                                      int64_t max_jobs) {
  auto tree = ParseYamlFile(path);
  if (!tree.ok()) return tree.status();
  for (size_t i = 0; i < overrides.size(); ++i) {
    absl::Status st = ApplyOverride(*tree, overrides[i], static_cast<int>(i + 1));
    if (!st.ok()) return st;
  }
  auto plan = ExpandConfig(*tree, max_jobs);
  if (!plan.ok()) return plan.status();
  return plan->is_sweep ? SummarizePlan(*plan) : Summarize(plan->jobs.front().job);
}

}  // namespace graft::config
