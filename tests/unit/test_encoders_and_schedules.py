"""Observation encoders (reversible numbering, binning, batches) and epsilon schedules (shapes and floors)."""

import numpy as np
import pandas as pd
import pytest
from gymnasium import spaces

from qtally.control.schedules import Constant, ExponentialDecay, GlieEpisodes, GlieVisits, LinearDecay, make_schedule
from qtally.envs.encoders import EncoderError, encoder_for_space, encoder_from_spec


def test_parts_numbering_is_reversible_and_matches_numpy():
    space = spaces.Tuple((spaces.Discrete(32), spaces.Discrete(11), spaces.Discrete(2)))
    enc = encoder_for_space(space, names=["player_sum", "dealer_card", "usable_ace"])
    for observation in [(0, 0, 0), (15, 10, 1), (31, 10, 1), (12, 1, 0)]:
        index = enc.encode(observation)
        assert index == np.ravel_multi_index(observation, (32, 11, 2))
        assert enc.decode(index) == observation
    assert enc.describe(enc.encode((15, 10, 1))) == "player_sum=15, dealer_card=10, usable_ace=1"


def test_multidiscrete_with_start_offsets():
    enc = encoder_for_space(spaces.MultiDiscrete([3, 4], start=[1, -2]))
    assert enc.encode((1, -2)) == 0 and enc.encode((3, 1)) == 11
    assert enc.decode(11) == (3, 1)


def test_every_form_of_a_multidiscrete_observation_encodes_alike():
    # The int64 array a MultiDiscrete space gives takes a shortcut past the int() calls.
    # Breakage caught: the shortcut forgetting the start offsets, taking a float or int32
    # array as int64, or letting a malformed array through with a traceback.
    space = spaces.MultiDiscrete([3, 4, 5], start=[1, -2, 0], seed=3)
    enc = encoder_for_space(space)
    for _ in range(50):
        sample = space.sample()
        assert sample.dtype == np.int64
        expected = int(np.ravel_multi_index(sample - space.start, (3, 4, 5)))
        forms = [sample, sample.astype(np.int32), sample.astype(np.float64), sample.tolist(), tuple(sample.tolist()), list(sample)]
        indices = [enc.encode(form) for form in forms]
        assert indices == [expected] * len(forms) and all(type(index) is int for index in indices), indices  # 7.0 == 7 would pass
    for bad in (np.array([[1], [0], [2]]), np.array([1, 0]), np.array(2), np.array([4, 0, 0]), np.array([1, -3, 0])):
        with pytest.raises(EncoderError):
            enc.encode(bad)


def test_a_remembered_observation_encodes_as_before_and_its_reshaped_twin_still_fails(monkeypatch):
    # A one-row int64 array seen in range is looked up by its bytes the next time. Breakage
    # caught: a memo keyed on bytes alone (a (3, 1) array has its row's bytes, a negative
    # start shifts nothing), a memo that outgrows its limit, or one that stores a wrong index.
    monkeypatch.setattr("qtally.envs.encoders.MEMO_LIMIT", 20)
    space = spaces.MultiDiscrete([3, 4, 5], start=[1, -2, 0], seed=7)
    enc = encoder_for_space(space)
    samples = [space.sample() for _ in range(60)]
    expected = [int(np.ravel_multi_index(sample - space.start, (3, 4, 5))) for sample in samples]
    assert [enc.encode(sample) for sample in samples] == expected
    assert [enc.encode(sample.copy()) for sample in samples] == expected  # the second time, from the memo where it holds them
    memo = enc.fast_encode.__globals__["memo"]
    assert 0 < len(memo) <= 20
    remembered = np.frombuffer(next(iter(memo)), dtype=np.int64)
    for twin in (remembered.reshape(3, 1), remembered.reshape(1, 3)):
        with pytest.raises(EncoderError):
            enc.encode(twin)


def test_batches_from_arrays_lists_and_frames_agree():
    enc = encoder_for_space(spaces.MultiDiscrete([3, 4]))
    rows = [[0, 1], [2, 3], [1, 0]]
    expected = [enc.encode(r) for r in rows]
    assert enc.encode_batch(np.array(rows)).tolist() == expected
    assert enc.encode_batch(rows).tolist() == expected
    assert enc.encode_batch(pd.DataFrame(rows, columns=["part0", "part1"])).tolist() == expected
    with pytest.raises(EncoderError, match="2 column"):
        enc.encode_batch([[1, 2, 3]])
    with pytest.raises(EncoderError, match="out of range"):
        enc.encode_batch([[5, 0]])


def test_box_binning_edges_and_refusals():
    space = spaces.Box(low=np.array([-1.0, -np.inf], dtype=np.float32), high=np.array([1.0, np.inf], dtype=np.float32))
    with pytest.raises(EncoderError, match="need binning"):
        encoder_for_space(space)
    with pytest.raises(EncoderError, match="unbounded"):
        encoder_for_space(space, bins=[2, 2])
    enc = encoder_for_space(space, bins=[2, 4], low=[-1.0, -2.0], high=[1.0, 2.0])
    assert enc.encode(np.array([-0.5, -1.5])) == 0
    assert enc.encode(np.array([0.5, 1.5])) == 7
    assert enc.encode(np.array([9.0, -9.0])) == 4  # outside the limits: the edge bins
    assert enc.decode(7) == pytest.approx((0.5, 1.5))
    assert encoder_from_spec(enc.spec()) == enc


def test_refused_spaces():
    with pytest.raises(EncoderError):
        encoder_for_space(spaces.Tuple((spaces.Discrete(2), spaces.Box(0, 1))))
    with pytest.raises(EncoderError):
        encoder_for_space(spaces.Dict({"a": spaces.Discrete(2)}))


def test_schedules_follow_their_formulas_and_floors():
    assert Constant(0.3)(1, 0) == Constant(0.3)(10**6, 10**6) == 0.3
    linear = LinearDecay(start=1.0, end=0.1, decay_episodes=100)
    assert linear(1, 0) == 1.0 and linear(51, 0) == pytest.approx(0.55) and linear(10**5, 0) == pytest.approx(0.1)
    exponential = ExponentialDecay(start=0.8, rate=0.5, floor=0.05)
    assert exponential(2, 0) == pytest.approx(0.4) and exponential(100, 0) == 0.05
    assert GlieEpisodes(scale=10, floor=0.0)(5, 0) == 1.0 and GlieEpisodes(scale=10, floor=0.0)(40, 0) == 0.25
    assert GlieEpisodes(scale=10, floor=0.02)(10**6, 0) == 0.02
    per_state = GlieVisits(scale=2.0, floor=0.0)
    assert per_state(999, 0) == 1.0 and per_state(999, 3) == 0.5 and per_state.per_state


def test_schedule_parameter_errors():
    with pytest.raises(ValueError, match=r"\[0, 1\]"):
        Constant(1.5)
    with pytest.raises(ValueError, match="rate"):
        ExponentialDecay(start=1.0, rate=0.0, floor=0.1)
    with pytest.raises(ValueError, match="unknown"):
        make_schedule("cosine")
