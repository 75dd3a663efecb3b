"""The environment edge: which states an episode acts in, a constructor's refusal as one line, pictures without warnings."""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from qtally.envs.factory import EnvironmentConfigError, EnvironmentSpec, make_environment
from qtally.envs.model_extraction import model_of
from qtally.experiment import bundled_environment_spec
from qtally.plots import grid_maps, two_factor_maps


def test_decision_states_from_the_model_leave_out_holes_and_goal():
    environment = make_environment(EnvironmentSpec(id="FrozenLake-v1", kwargs={"map_name": "4x4"}))
    try:
        mask = environment.decision_states(model_of(environment.env))
    finally:
        environment.close()
    # Gymnasium's 4x4 map is SFFF / FHFH / FFFH / HFFG: holes 5, 7, 11, 12 and the goal 15 end the episode.
    assert np.flatnonzero(~mask).tolist() == [5, 7, 11, 12, 15]


def test_decision_states_without_a_model_are_the_start_states():
    environment = make_environment(bundled_environment_spec("blackjack")[0])
    try:
        mask = environment.decision_states()
        starts = {environment.encoder.encode(s) for s in environment.start_control.start_states()}
        encode = environment.encoder.encode
        assert set(np.flatnonzero(mask).tolist()) == starts
        assert mask[encode((13, 2, 0))] and mask[encode((20, 10, 1))]
        assert not mask[encode((22, 2, 0))] and not mask[encode((31, 10, 0))]  # a bust hand is never acted in
    finally:
        environment.close()


def test_decision_states_with_neither_are_every_state():
    environment = make_environment(bundled_environment_spec("cartpole_binned")[0])
    try:
        assert environment.start_control is None
        assert environment.decision_states().all() and environment.decision_states().shape == (environment.n_states,)
    finally:
        environment.close()


@pytest.mark.parametrize("kwargs, words", [
    ({"map_name": "5x5"}, ["env.kwargs={'map_name': '5x5'}", "refused them", "KeyError: '5x5'"]),
    ({"map_name": "4x4", "no_such_argument": 1}, ["'no_such_argument': 1", "refused them", "unexpected keyword argument 'no_such_argument'"]),
])
def test_a_constructor_that_refuses_its_kwargs_is_one_named_error(kwargs, words):
    with pytest.raises(EnvironmentConfigError) as caught:
        make_environment(EnvironmentSpec(id="FrozenLake-v1", kwargs=kwargs))
    message = str(caught.value)
    assert "\n" not in message
    for word in words:
        assert word in message, message


def test_pictures_of_states_nobody_visited_draw_without_warnings(tmp_path):
    """Nothing estimated yet (every value NaN): an empty picture, not numpy's all-NaN RuntimeWarning."""
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        two_factor_maps(np.full((2, 3, 4), np.nan), np.zeros((2, 3, 4), dtype=int), [0, 1, 2], [0, 1, 2, 3], "r", "c", "AB", ["x", "y"], tmp_path / "a.png", "t")
        grid_maps(np.full(16, np.nan), np.zeros(16, dtype=int), (4, 4), "<v>^", tmp_path / "b.png", "t")
    assert (tmp_path / "a.png").stat().st_size > 0 and (tmp_path / "b.png").stat().st_size > 0
