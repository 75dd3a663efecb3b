"""The compiled learning kernel: whole episodes from an outcome table, and their updates, in numba.

This is the gym path's ``Trainer.play_and_learn`` plus the variants' updates, rewritten for
machine code over arrays (:mod:`qtally.engine.compiled` wires it). Every arithmetic step
is the same as the Python path's, in the same order, so both produce the same floats:
the acting decision (:func:`qtally.policy.table_policy.epsilon_greedy_decision`), the
schedules (:mod:`qtally.control.schedules`), the tail value (:mod:`qtally.control.truncation`
and each variant's ``tail_value``) and the backward updates (:mod:`qtally.control.variants`).
The tests hold the two paths to equality, Q table bit for bit. :func:`update_episode` also
serves the gym path for long episodes, through :func:`update_played` (:mod:`qtally.engine.compiled_update`).

Uniforms come in windows from three streams (environment, acting, starts); the kernel
stops before an episode that might run out of any and says how many it read.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

# Codes shared with qtally.engine.compiled.
EXPLORING_STARTS, ON_POLICY, OFF_POLICY = 0, 1, 2
CONSTANT, LINEAR, EXPONENTIAL, GLIE_EPISODE, GLIE_VISITS = 0, 1, 2, 3, 4
AS_TERMINAL, BOOTSTRAP, DISCARD = 0, 1, 2
_SCAN_UP_TO = 8  # first-visit episodes up to this long look back for a pair's earlier visit rather than fill the scratch table


@njit(cache=True)
def _epsilon(kind, p0, p1, p2, episode, state_visits):
    """The schedule's epsilon (the same expressions as qtally.control.schedules)."""
    if kind == CONSTANT:
        return p0
    if kind == LINEAR:
        fraction = min(1.0, (episode - 1) / p2)
        return p0 + (p1 - p0) * fraction
    if kind == EXPONENTIAL:
        return max(p2, p0 * math.pow(p1, float(episode - 1)))
    if kind == GLIE_EPISODE:
        return max(p1, min(1.0, p0 / episode))
    return max(p1, min(1.0, p0 / (state_visits + 1)))


@njit(cache=True)
def _greedy(q, s):
    """The lowest index among the row's largest values (numpy's argmax)."""
    best = 0
    value = q[s, 0]
    for a in range(1, q.shape[1]):
        if q[s, a] > value:
            value = q[s, a]
            best = a
    return best


@njit(cache=True)
def _pick(probabilities, lo, hi, u):
    """The draw protocol: the first outcome whose running sum exceeds u, else the first."""
    total = 0.0
    for k in range(lo, hi):
        total += probabilities[k]
        if total > u:
            return k
    return lo


@njit(cache=True, inline="always")  # inlined into learn_episodes: a call per episode cost it a tenth on Blackjack
def update_episode(q, visits, weights, greedy, state_visits, states, actions, rewards, probabilities, length, tail, variant, first_visit, gamma, step_size, first_time, counters):
    """One episode's backward update (:mod:`qtally.control.variants`, the same sums in the same order); returns the steps used.

    ``states`` to ``probabilities``: the episode's first ``length`` steps, as arrays or
    buffers. ``greedy``: the greedy action of every state, kept in step as ``q`` changes
    (``None``: none kept, the off-policy cut reads the row; numba then compiles the
    bookkeeping away, which the compiled engine's short Blackjack hands notice).
    ``state_visits``: the per-state visit counts, to which every step's state adds one
    (``None``: the caller counts them, as the compiled engine does while playing). ``first_time``: scratch of
    ``q.size`` entries, all -1 between calls. ``counters[1]`` counts the pairs whose visits
    go from 0 to 1. ``step_size`` < 0 means the sample average.
    """
    n_actions = q.shape[1]
    if length <= 0:
        return 0
    if state_visits is not None:
        for t in range(length):
            state_visits[states[t]] += 1
    scratch = first_visit and length > _SCAN_UP_TO  # short episodes find a pair's first visit by looking back instead
    if scratch:
        for t in range(length):
            key = states[t] * n_actions + actions[t]
            if first_time[key] < 0:
                first_time[key] = t
    used = 0
    g = tail
    w = 1.0
    for t in range(length - 1, -1, -1):
        s = states[t]
        a = actions[t]
        g = gamma * g + rewards[t]
        counted = True
        if scratch:
            counted = first_time[s * n_actions + a] == t
        elif first_visit:
            for j in range(t):
                if states[j] == s and actions[j] == a:
                    counted = False
                    break
        if variant == OFF_POLICY:
            if counted:
                weights[s, a] += w
                visits[s, a] += 1
                if visits[s, a] == 1:
                    counters[1] += 1
                step = w / weights[s, a] if step_size < 0.0 else min(1.0, step_size * w)
                q[s, a] += step * (g - q[s, a])
                if greedy is not None:
                    greedy[s] = _greedy(q, s)
            used += 1
            best = _greedy(q, s) if greedy is None else greedy[s]
            if a != best:
                break
            w /= probabilities[t]
        elif counted:
            visits[s, a] += 1
            if visits[s, a] == 1:
                counters[1] += 1
            step = 1.0 / visits[s, a] if step_size < 0.0 else step_size
            q[s, a] += step * (g - q[s, a])
            if greedy is not None:
                greedy[s] = _greedy(q, s)
    if variant != OFF_POLICY:
        used = length
    if scratch:
        for t in range(length):
            first_time[states[t] * n_actions + actions[t]] = -1
    return used


@njit(cache=True)
def update_played(q, visits, weights, greedy, state_visits, steps, rewards, probabilities, tail, variant, first_visit, gamma, step_size, first_time, counters):
    """:func:`update_episode` of an episode played in Python: ``steps`` holds its states, then its actions.

    ``steps``, ``rewards`` and ``probabilities`` may be ``array.array`` buffers, which the
    gym path builds from its lists in about half the time of a numpy conversion
    (:mod:`qtally.engine.compiled_update`). numba cannot slice a buffer, so they are copied
    into arrays here, which costs nanoseconds. ``probabilities`` may be empty where the
    variant does not read them.
    """
    length = len(steps) // 2
    states = np.empty(length, np.int64)
    actions = np.empty(length, np.int64)
    step_rewards = np.empty(length, np.float64)
    behaviour = np.empty(length if len(probabilities) else 0, np.float64)
    for t in range(length):
        states[t] = steps[t]
        actions[t] = steps[length + t]
        step_rewards[t] = rewards[t]
    for t in range(behaviour.shape[0]):
        behaviour[t] = probabilities[t]
    return update_episode(q, visits, weights, greedy, state_visits, states, actions, step_rewards, behaviour, length, tail, variant, first_visit, gamma, step_size, first_time, counters)


@njit(cache=True, inline="always")  # inlined into each entry point below, where the variant is a constant
def _learn_episodes(variant, counts, model, tables, draws, rules, buffers, log):
    """Play and learn up to ``n_episodes`` episodes; return (episodes done, env, acting, start uniforms read).

    The arguments come in groups (tuples), unpacked first: ``counts`` (n_episodes,
    episode_before); ``model``, the outcome table's arrays and the exploring starts;
    ``tables`` (q, visits, weights, state_visits); ``draws``, the three streams' windows;
    ``rules`` (first_visit, gamma, step_size, the schedule's kind and p0 to p2,
    truncation, time_limit, step_cap); ``buffers``, one episode's steps and the
    first-visit scratch; ``log`` (window, log_every, span_end, closed, counters).

    ``step_size`` < 0 means the sample average. ``time_limit`` 0 means none. ``window``
    holds the logging window's running sums (episodes, return, length, epsilon, truncated,
    capped, steps used), added to one episode at a time as :class:`LogWindow.add` does.
    After an episode whose number is a multiple of ``log_every`` (other than ``span_end``,
    which the caller closes), the window's sums go to row ``counters[0]`` of ``closed``
    with the number of state-action pairs that have absorbed a return (``counters[1]``,
    kept as visits go from 0 to 1) in column 7, and the sums start again from 0: one call
    covers many logging windows, and the Python around a call is paid once per span.
    """
    n_episodes, episode_before = counts
    offsets, next_states, probabilities, rewards, opening_rewards, terminated, start_states, start_probabilities, es_starts = model
    q, visits, weights, state_visits = tables
    env_u, acting_u, start_u = draws
    first_visit, gamma, step_size, schedule_kind, p0, p1, p2, truncation, time_limit, step_cap = rules
    buffer_states, buffer_actions, buffer_rewards, buffer_probabilities, first_time = buffers
    window, log_every, span_end, closed, counters = log
    n_actions = q.shape[1]
    max_length = buffer_states.shape[0]
    env_used = 0
    acting_used = 0
    start_used = 0
    done = 0
    next_close = (episode_before // log_every + 1) * log_every if log_every > 0 else -1
    while done < n_episodes:
        if env_u.shape[0] - env_used < max_length + 1 or acting_u.shape[0] - acting_used < max_length:
            break
        if variant == EXPLORING_STARTS and start_u.shape[0] - start_used < 1:
            break
        episode = episode_before + done + 1
        # ---------------------------------------------------------- start
        u_reset = env_u[env_used]
        env_used += 1
        forced = -1
        if variant == EXPLORING_STARTS:
            pairs = es_starts.shape[0] * n_actions
            index = min(int(start_u[start_used] * pairs), pairs - 1)
            start_used += 1
            start = index // n_actions
            state = es_starts[start]
            forced = index - start * n_actions
            state_visits[state] += 1
        else:
            state = start_states[_pick(start_probabilities, 0, start_probabilities.shape[0], u_reset)]
        # ---------------------------------------------------------- play
        length = 0
        total = 0.0
        epsilon_sum = 0.0
        decisions = 0
        is_terminated = False
        is_truncated = False
        capped = False
        while True:
            if forced >= 0 and length == 0:
                action = forced
                probability = 1.0
            else:
                epsilon = 0.0
                if variant != EXPLORING_STARTS:
                    epsilon = _epsilon(schedule_kind, p0, p1, p2, episode, state_visits[state])
                epsilon_sum += epsilon
                decisions += 1
                state_visits[state] += 1
                u = acting_u[acting_used]
                acting_used += 1
                greedy = _greedy(q, state)
                if u < epsilon:
                    action = min(int(u / epsilon * n_actions), n_actions - 1)
                else:
                    action = greedy
                probability = epsilon / n_actions + ((1.0 - epsilon) if action == greedy else 0.0)
            row = state * n_actions + action
            k = _pick(probabilities, offsets[row], offsets[row + 1], env_u[env_used])
            env_used += 1
            buffer_states[length] = state
            buffer_actions[length] = action
            reward = opening_rewards[k] if length == 0 else rewards[k]
            buffer_rewards[length] = reward
            buffer_probabilities[length] = probability
            total += reward
            length += 1
            state = next_states[k]
            is_terminated = terminated[k]
            if is_terminated or (time_limit > 0 and length >= time_limit):
                is_truncated = not is_terminated
                break
            if length >= step_cap:
                is_truncated = True
                capped = True
                break
        # ---------------------------------------------------------- tail
        learn = True
        tail = 0.0
        if is_truncated and truncation == BOOTSTRAP:
            if variant == ON_POLICY:
                epsilon = _epsilon(schedule_kind, p0, p1, p2, episode, state_visits[state])
                row_sum = 0.0
                row_max = q[state, 0]
                for a in range(n_actions):
                    row_sum += q[state, a]
                    if q[state, a] > row_max:
                        row_max = q[state, a]
                tail = epsilon * (row_sum / n_actions) + (1.0 - epsilon) * row_max
            else:
                tail = q[state, _greedy(q, state)]
        elif is_truncated and truncation == DISCARD:
            learn = False
        # ---------------------------------------------------------- update
        used = 0
        if learn:
            used = update_episode(
                q, visits, weights, None, None, buffer_states, buffer_actions, buffer_rewards, buffer_probabilities,
                length, tail, variant, first_visit, gamma, step_size, first_time, counters,
            )
        window[0] += 1
        window[1] += total
        window[2] += length
        window[3] += epsilon_sum / decisions if decisions > 0 else 0.0
        window[4] += is_truncated
        window[5] += capped
        window[6] += used
        done += 1
        if episode == next_close:  # a multiple of log_every, counted rather than divided for
            next_close += log_every
            if episode == span_end:
                continue
            filled = counters[0]
            for i in range(7):
                closed[filled, i] = window[i]
                window[i] = 0.0
            closed[filled, 7] = counters[1]
            counters[0] = filled + 1
    return done, env_used, acting_used, start_used


# The entry points: one per variant, so that compiled code holds the variant as a constant
# and drops the other variants' branches (measured on Blackjack, numba 0.68: exploring
# starts a tenth faster, on-policy a few percent). Off-policy takes the variant at run
# time: as a constant it made Blackjack's off-policy hands a tenth slower.


@njit(cache=True)
def learn_exploring_starts(counts, model, tables, draws, rules, buffers, log):
    return _learn_episodes(EXPLORING_STARTS, counts, model, tables, draws, rules, buffers, log)


@njit(cache=True)
def learn_on_policy(counts, model, tables, draws, rules, buffers, log):
    return _learn_episodes(ON_POLICY, counts, model, tables, draws, rules, buffers, log)


@njit(cache=True)
def learn_any_variant(variant, counts, model, tables, draws, rules, buffers, log):
    return _learn_episodes(variant, counts, model, tables, draws, rules, buffers, log)


def learn_episodes(variant, counts, model, tables, draws, rules, buffers, log):
    """:func:`_learn_episodes` through the variant's entry point."""
    if variant == EXPLORING_STARTS:
        return learn_exploring_starts(counts, model, tables, draws, rules, buffers, log)
    if variant == ON_POLICY:
        return learn_on_policy(counts, model, tables, draws, rules, buffers, log)
    return learn_any_variant(variant, counts, model, tables, draws, rules, buffers, log)


@njit(cache=True)
def reference_kernel(offsets, next_states, probabilities, rewards, terminated, start_states, start_probabilities, es_starts, epsilon, gamma, q, n_steps, seed, learn):
    """The benchmark's limit: Monte Carlo control in the fewest operations, nothing recorded.

    Episodes start as the variant's do: from the start distribution, or, where ``es_starts``
    is not empty, from a uniformly drawn exploring start (state and first action). Each is
    played epsilon-greedily on ``q`` and, with ``learn``, learned from by every-visit sample
    averages, backwards; without it, nothing is learned (table stepping alone). Uniforms
    come from numba's own generator; no streams, first-visit rule, schedule, truncation,
    importance weights or logging.
    """
    np.random.seed(seed)
    n_actions = q.shape[1]
    pairs = es_starts.shape[0] * n_actions
    counts = np.zeros(q.shape)
    states = np.empty(200, np.int64)
    actions = np.empty(200, np.int64)
    gains = np.empty(200)
    steps = 0
    episodes = 0
    while steps < n_steps:
        forced = -1
        if pairs > 0:
            index = np.random.randint(pairs)
            state = es_starts[index // n_actions]
            forced = index % n_actions
        else:
            state = start_states[_pick(start_probabilities, 0, start_probabilities.shape[0], np.random.random())]
        episodes += 1
        length = 0
        while length < 200:
            if forced >= 0:
                action = forced
                forced = -1
            elif np.random.random() < epsilon:
                action = np.random.randint(n_actions)
            else:
                action = _greedy(q, state)
            row = state * n_actions + action
            k = _pick(probabilities, offsets[row], offsets[row + 1], np.random.random())
            states[length] = state
            actions[length] = action
            gains[length] = rewards[k]
            length += 1
            state = next_states[k]
            if terminated[k]:
                break
        steps += length
        if learn:
            g = 0.0
            for t in range(length - 1, -1, -1):
                g = gamma * g + gains[t]
                s = states[t]
                a = actions[t]
                counts[s, a] += 1.0
                q[s, a] += (g - q[s, a]) / counts[s, a]
    return steps, episodes
