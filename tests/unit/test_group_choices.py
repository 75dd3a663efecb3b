"""A misspelled config-group choice or a launcher whose plugin is missing is named in one line before Hydra runs."""

import pytest

from qtally.cli import group_choices
from qtally.cli.group_choices import first_bad_choice

GROUPS = ("env", "variant", "schedule")


@pytest.mark.parametrize(
    "argument, expected",
    [
        ("variant=on_polcy", "did you mean on_policy"),
        ("schedule=constant,glei_visits", "schedule='glei_visits' is not a known choice; did you mean glie_visits"),
        ("hydra/launcher=jobllib", "did you mean joblib"),
        ("env=nowhere_at_all", "choices are: blackjack, cartpole_binned"),
    ],
)
def test_unknown_choices_name_the_closest(argument, expected):
    assert expected in first_bad_choice([argument], GROUPS)


def test_known_choices_and_other_keys_pass(tmp_path):
    assert first_bad_choice(["env=restock", "variant=off_policy", "schedule=glie_visits,constant", "episodes=5", "env.id=Taxi-v4"], GROUPS) is None
    # A user's own group config, found through --config-dir.
    (tmp_path / "env").mkdir()
    (tmp_path / "env" / "my_shop.yaml").write_text("id: my_package.shop:ShopEnv\n")
    assert first_bad_choice(["--config-dir", str(tmp_path), "env=my_shop"], GROUPS) is None
    assert first_bad_choice(["env=my_shop"], GROUPS) is not None


def test_a_launcher_without_its_plugin_names_the_extra(monkeypatch):
    monkeypatch.setattr(group_choices, "_installed", lambda module: module is None)
    assert "pip install 'qtally[sweep]'" in first_bad_choice(["hydra/launcher=joblib"], GROUPS)
    assert "pip install 'qtally[ray]'" in first_bad_choice(["hydra/launcher=ray_loopback"], GROUPS)
    assert first_bad_choice(["hydra/launcher=basic"], GROUPS) is None
