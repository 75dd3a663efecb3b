#!/usr/bin/env bash
# Mutation testing of qtally's learning core and its metric writer with mutmut 3 (not run in CI).
#
#   scripts/mutation.sh                       mutate every core module, then print the score
#   scripts/mutation.sh returns variants      only these modules (short names below)
#   scripts/mutation.sh --score [modules]     print the score of what has run so far, run nothing
#   MUTATION_SHOW=1 scripts/mutation.sh ...   also print the diff of every surviving mutant
#
# Short names: returns schedules action_values variants streams truncation trainer_state
# episodes table_policy exact prediction gym_episodes player seeded_evaluation sqlite_metrics.
#
# What is mutated and which tests judge the mutants is configured in pyproject.toml,
# [tool.mutmut]: the fast unit tests only. Set up from a clean checkout with
#   python3 -m venv .venv && . .venv/bin/activate && pip install -e '.[test]' mutmut
# Results are kept in mutants/ (ignored by git), so a second run re-checks only what
# changed; `rm -rf mutants` starts over. MUTATION_CHILDREN (default 2) caps the parallel
# test processes. Equivalent survivors and the last scores: DEVELOPERS.md, "Mutation testing".
set -euo pipefail
cd "$(dirname "$0")/.."

declare -A MODULE=(
    [returns]=qtally.control.returns
    [schedules]=qtally.control.schedules
    [action_values]=qtally.control.action_values
    [variants]=qtally.control.variants
    [streams]=qtally.control.streams
    [truncation]=qtally.control.truncation
    [trainer_state]=qtally.control.trainer_state
    [episodes]=qtally.control.episodes
    [table_policy]=qtally.policy.table_policy
    [exact]=qtally.evaluate.exact
    [prediction]=qtally.evaluate.prediction
    [gym_episodes]=qtally.engine.episodes
    [player]=qtally.engine.player
    [seeded_evaluation]=qtally.evaluate.seeded_evaluation
    [sqlite_metrics]=qtally.tracking.sqlite_metrics
)
ORDER=(returns schedules action_values variants streams truncation trainer_state episodes table_policy exact prediction gym_episodes player seeded_evaluation sqlite_metrics)

score_only=0
if [[ "${1:-}" == "--score" ]]; then
    score_only=1
    shift
fi
names=("$@")
if [[ ${#names[@]} -eq 0 ]]; then
    names=("${ORDER[@]}")
fi
prefixes=()
for name in "${names[@]}"; do
    if [[ -z "${MODULE[$name]:-}" ]]; then
        echo "mutation.sh: error: module=$name is unknown; choose from ${ORDER[*]}" >&2
        exit 2
    fi
    prefixes+=("${MODULE[$name]}")
done

version=$(mutmut --version 2>/dev/null | awk '{print $NF}') || true
if [[ "${version%%.*}" != "3" ]]; then
    echo "mutation.sh: error: mutmut=${version:-missing} is not usable; install mutmut 3 (pip install mutmut)" >&2
    exit 2
fi

if [[ $score_only -eq 0 ]]; then
    patterns=()
    for prefix in "${prefixes[@]}"; do
        patterns+=("$prefix.*")
    done
    # mutmut redraws its progress line many times a second: keep the whole output in a log
    # and show its last state (or, if the run failed, the end of the log).
    mkdir -p mutants
    log=mutants/mutation-run.log
    if ! mutmut run --max-children "${MUTATION_CHILDREN:-2}" "${patterns[@]}" > "$log" 2>&1; then
        tr '\r' '\n' < "$log" | grep -v '^\s*$' | tail -n 30
        echo "mutation.sh: error: mutmut run failed (whole output in $log)" >&2
        exit 1
    fi
    tr '\r' '\n' < "$log" | grep -v '^\s*$' | tail -n 1
fi

# The verdicts go through a file: with every module mutated they are too long for one argument.
mkdir -p mutants
mutmut results --all true > mutants/results.txt
python3 - "${prefixes[@]}" <<'PY'
import os, subprocess, sys
from collections import Counter

prefixes = sys.argv[1:]
status = {}
for line in open("mutants/results.txt", encoding="utf-8").read().splitlines():
    name, _, verdict = line.strip().rpartition(": ")
    if any(name.startswith(prefix + ".") for prefix in prefixes):
        status[name] = verdict
counts = Counter(status.values())
detected = counts["killed"] + counts["timeout"]
judged = sum(n for verdict, n in counts.items() if verdict not in ("not checked", "skipped"))
print(f"mutants: {len(status)}, judged: {judged}, killed: {counts['killed']}, timeout: {counts['timeout']}, "
      f"survived: {counts['survived']}, no tests: {counts['no tests']}, not checked: {counts['not checked']}")
if judged:
    print(f"score (killed + timeout) / judged: {detected}/{judged} = {100 * detected / judged:.1f}%")
for prefix in prefixes:
    mine = [v for n, v in status.items() if n.startswith(prefix + ".") and v not in ("not checked", "skipped")]
    if mine:
        print(f"  {prefix}: {sum(v in ('killed', 'timeout') for v in mine)}/{len(mine)}")
left = sorted(n for n, v in status.items() if v not in ("killed", "timeout", "not checked", "skipped"))
if left:
    print("not killed:")
for name in left:
    print(f"  {name}: {status[name]}")
    if os.environ.get("MUTATION_SHOW") == "1":
        print(subprocess.run(["mutmut", "show", name], capture_output=True, text=True).stdout)
PY
