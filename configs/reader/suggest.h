// "Did you mean ...?": the nearest valid name to a misspelt one. Pure functions.
#ifndef GRAFT_CONFIGS_READER_SUGGEST_H_
#define GRAFT_CONFIGS_READER_SUGGEST_H_

#include <string>
#include <vector>

namespace graft::config {

// Edit distance with adjacent transpositions (optimal string alignment): insertions,
// deletions, substitutions and swaps of two neighbours each cost 1.
int EditDistance(const std::string& a, const std::string& b);

// The candidate nearest to `word` when it is close enough to be a plausible typo (distance at
// most max(1, |word| / 3)), else "". Ties go to the earlier candidate.
std::string Nearest(const std::string& word, const std::vector<std::string>& candidates);

}  // namespace graft::config

#endif  // GRAFT_CONFIGS_READER_SUGGEST_H_
