"""RestockEnv: a small shop restocking a perishable product over a selling season.

Every morning of a season of ``horizon`` days the shop sees what is left on its shelf,
sorted by age, and orders ``0..max_order`` fresh units, which arrive at once. Customers
then come; the day's demand is random with a weekly pattern. Sales take the oldest units
first (FIFO), demand that finds the shelf empty is lost, and overnight every unsold unit
ages by one day: units reaching ``shelf_life`` days spoil. After the last day's sales the
leftover stock is sold off at ``salvage_value`` a unit and the season ends.

The scenario is small enough to be solved exactly (:meth:`RestockEnv.tabular_model`) and
random enough that Monte Carlo control has to learn from episodes.

Definitions
-----------
Age
    The number of nights a unit has spent on the shelf. A unit delivered this morning
    has age 0; a unit of age ``shelf_life - 1`` that is still unsold in the evening
    spoils overnight. So a unit can be sold on ``shelf_life`` consecutive days.
Observation
    ``MultiDiscrete(nvec)`` with parts ``(day, stock_age1, ..., stock_age{L-1})`` where
    ``L = shelf_life``: the day of the season and the morning stock of each age. Age 0 is
    not part of the observation because in the morning, before the order, there are no
    units of age 0. ``nvec = (horizon + 1, stock_cap + 1, ..., stock_cap + 1)``; with
    ``shelf_life == 1`` nothing carries over and the observation is ``(day,)``.
    The table index of an observation is ``np.ravel_multi_index(obs, nvec)`` (C order),
    and :meth:`RestockEnv.tabular_model` numbers its states the same way.
Termination
    Day ``horizon`` is an absorbing terminal layer of the observation space: the step of
    the last day returns ``(horizon, 0, ..., 0)`` (the leftover stock has been salvaged)
    with ``terminated=True``. Every observation with ``day == horizon`` is marked terminal
    in the model; only the one with empty shelves is ever reached.
Demand
    Day ``t`` falls on weekday ``t % 7`` (day 0 is a Monday). Demand is
    ``min(X, max_demand)`` with ``X ~ Poisson(weekly_demand_means[t % 7])``: a Poisson
    count censored at ``max_demand``, so ``P(D = max_demand) = P(X >= max_demand)``. This
    keeps the model finite while the sampler stays exactly the one the model describes.
    The sampler follows qtally's draw protocol (:mod:`qtally.envs.outcomes`): one uniform
    per reset and one per day, the demand picked by inverse transform over ``0..max_demand``
    in that order, so :meth:`RestockEnv.outcome_table` replays it draw for draw.
Stock cap
    ``stock_cap`` bounds the stock of every age carried overnight. Units of an age above
    the cap are discarded overnight (counted in ``info["discarded"]`` and charged
    ``spoilage_cost`` like spoiled units). Since only ordered units enter the shelf, the
    cap never binds when ``stock_cap >= max_order`` (the default), so nothing is ever
    discarded unless you choose a smaller cap.
Reward of a day
    ``price * sold - unit_cost * ordered - holding_cost * kept - spoilage_cost * (spoiled
    + discarded) - lost_sale_cost * lost``, where ``kept`` counts units carried into the
    next morning. On the last day nothing is kept or spoiled: ``salvage_value *
    salvaged`` is added for the leftover units instead. ``info`` itemises every term.

All default prices, costs and demand means are invented for illustration; they describe
no real shop. With the defaults the model has 15 * 6 * 6 = 540 states and 6 actions.

>>> env = RestockEnv()
>>> obs, info = env.reset(seed=3)
>>> obs.tolist(), env.observation_names
([0, 0, 0], ('day', 'stock_age1', 'stock_age2'))
>>> obs, reward, terminated, truncated, info = env.step(3)
>>> info["ordered"], info["sold"] + info["kept"] + info["spoiled"] + info["discarded"]
(3, 3)
>>> env.tabular_model().n_states
540
>>> make_newsvendor_kwargs(mean_demand=6.0)["horizon"]
1
"""

from __future__ import annotations

from bisect import bisect_right
from itertools import accumulate
from typing import Any, Sequence

import gymnasium as gym
import numpy as np
from gymnasium import spaces
from scipy import stats

from .model import NoModelError, TabularModel
from .outcomes import OutcomeTable

__all__ = [
    "RestockEnv",
    "RESTOCK_ID",
    "register_restock",
    "make_newsvendor_kwargs",
    "demand_pmf",
]

RESTOCK_ID = "qtally/Restock-v0"

WEEKDAY_NAMES = ("Mon", "Tue", "Wed", "Thu", "Fri", "Sat", "Sun")

# Invented demand means for Monday..Sunday: a quiet start of the week, a busy weekend.
DEFAULT_WEEKLY_DEMAND_MEANS = (2.0, 2.0, 2.5, 3.0, 4.0, 4.5, 1.5)


def demand_pmf(mean: float, max_demand: int) -> np.ndarray:
    """Probabilities of demand ``0..max_demand``: Poisson(mean) censored at ``max_demand``.

    >>> p = demand_pmf(2.0, 3)
    >>> p.shape, round(float(p.sum()), 12), bool(p[3] > 0)
    ((4,), 1.0, True)
    """
    counts = np.arange(max_demand + 1)
    pmf = stats.poisson.pmf(counts, mean).astype(np.float64)
    pmf[max_demand] = float(stats.poisson.sf(max_demand - 1, mean)) if max_demand > 0 else 1.0
    return pmf


class RestockEnv(gym.Env):
    """Restocking a perishable product over a season; see the module docstring.

    Parameters (defaults are invented):
        horizon: days in the season (14).
        shelf_life: days a unit can be sold, counting its delivery day (3).
        max_order: largest order of a morning; actions are ``0..max_order`` (5).
        stock_cap: most units of one age carried overnight; ``None`` means ``max_order``
            (then nothing is ever discarded).
        price: selling price a unit (4.0).
        unit_cost: purchase cost a unit ordered (1.5).
        holding_cost: cost a unit kept overnight (0.1).
        spoilage_cost: disposal cost a unit spoiled or discarded (0.5).
        lost_sale_cost: goodwill cost a unit of unmet demand (1.0).
        salvage_value: value a unit left after the last day (0.0).
        weekly_demand_means: seven Poisson means, Monday first (2, 2, 2.5, 3, 4, 4.5, 1.5).
        max_demand: demand is censored at this count (10).
        model_state_limit: largest state count for which ``tabular_model()`` is built (20000).
        render_mode: ``None``, ``"ansi"`` or ``"rgb_array"``.
    """

    metadata = {"render_modes": ["ansi", "rgb_array"], "render_fps": 4}

    def __init__(
        self,
        horizon: int = 14,
        shelf_life: int = 3,
        max_order: int = 5,
        stock_cap: int | None = None,
        price: float = 4.0,
        unit_cost: float = 1.5,
        holding_cost: float = 0.1,
        spoilage_cost: float = 0.5,
        lost_sale_cost: float = 1.0,
        salvage_value: float = 0.0,
        weekly_demand_means: Sequence[float] = DEFAULT_WEEKLY_DEMAND_MEANS,
        max_demand: int = 10,
        model_state_limit: int = 20000,
        render_mode: str | None = None,
    ):
        if int(horizon) < 1:
            raise ValueError(f"horizon must be at least 1, got {horizon}")
        if int(shelf_life) < 1:
            raise ValueError(f"shelf_life must be at least 1, got {shelf_life}")
        if int(max_order) < 0:
            raise ValueError(f"max_order must be non-negative, got {max_order}")
        stock_cap = int(max_order) if stock_cap is None else int(stock_cap)
        if stock_cap < 0:
            raise ValueError(f"stock_cap must be non-negative, got {stock_cap}")
        means = np.asarray(weekly_demand_means, dtype=np.float64)
        if means.shape != (7,) or np.any(means < 0) or not np.all(np.isfinite(means)):
            raise ValueError(f"weekly_demand_means needs 7 finite non-negative numbers, got {weekly_demand_means!r}")
        if int(max_demand) < 0:
            raise ValueError(f"max_demand must be non-negative, got {max_demand}")
        if render_mode is not None and render_mode not in self.metadata["render_modes"]:
            raise ValueError(f"render_mode must be one of {self.metadata['render_modes']} or None, got {render_mode!r}")

        self.horizon = int(horizon)
        self.shelf_life = int(shelf_life)
        self.max_order = int(max_order)
        self.stock_cap = stock_cap
        self.price = float(price)
        self.unit_cost = float(unit_cost)
        self.holding_cost = float(holding_cost)
        self.spoilage_cost = float(spoilage_cost)
        self.lost_sale_cost = float(lost_sale_cost)
        self.salvage_value = float(salvage_value)
        self.weekly_demand_means = tuple(float(m) for m in means)
        self.max_demand = int(max_demand)
        self.model_state_limit = int(model_state_limit)
        self.render_mode = render_mode

        self.n_carried_ages = self.shelf_life - 1
        self.nvec = np.array([self.horizon + 1] + [self.stock_cap + 1] * self.n_carried_ages, dtype=np.int64)
        self.observation_space = spaces.MultiDiscrete(self.nvec)
        self._nvec_list = self.nvec.tolist()
        self.action_space = spaces.Discrete(self.max_order + 1)
        self.observation_names = ("day",) + tuple(f"stock_age{a}" for a in range(1, self.shelf_life))
        self.action_names = tuple(f"order_{q}" for q in range(self.max_order + 1))

        # Running sums of each weekday's demand probabilities, added in order as the
        # protocol's pick adds them (itertools.accumulate adds left to right).
        self._demand_pmfs = tuple(demand_pmf(m, self.max_demand) for m in self.weekly_demand_means)
        self._demand_cumulative = tuple(list(accumulate(p.tolist())) for p in self._demand_pmfs)

        self._day = 0
        self._stock = np.zeros(self.n_carried_ages, dtype=np.int64)
        self._stock_list: list[int] = [0] * self.n_carried_ages
        self._last: dict[str, Any] | None = None
        self._episode_return = 0.0

    # ------------------------------------------------------------------ dynamics
    def _serve_days(self, stock: np.ndarray, order: np.ndarray, demand: np.ndarray, last_day: np.ndarray) -> dict:
        """One day for a batch: the single definition shared by ``step`` and ``tabular_model``.

        stock: ``(N, shelf_life - 1)`` morning stock of ages 1..L-1; order, demand: ``(N,)``;
        last_day: ``(N,)`` bool. Returns counts, money items, reward and next stock, all arrays.
        """
        n = order.shape[0]
        shelf = np.concatenate([order[:, None], stock], axis=1).astype(np.int64)  # ages 0..L-1
        left = shelf.copy()
        unmet = demand.astype(np.int64).copy()
        for age in range(self.shelf_life - 1, -1, -1):  # oldest first
            take = np.minimum(left[:, age], unmet)
            left[:, age] -= take
            unmet -= take
        sold = demand - unmet
        leftover = left.sum(axis=1)
        aged = left[:, : self.n_carried_ages]  # become ages 1..L-1 overnight
        carried = np.minimum(aged, self.stock_cap)
        on = ~last_day
        spoiled = np.where(on, left[:, self.shelf_life - 1], 0)
        discarded = np.where(on, (aged - carried).sum(axis=1), 0)
        next_stock = np.where(on[:, None], carried, 0).reshape(n, self.n_carried_ages)
        kept = next_stock.sum(axis=1)
        salvaged = np.where(last_day, leftover, 0)

        return {
            "shelf": shelf,
            "sold": sold,
            "demand": demand,
            "lost": unmet,
            "spoiled": spoiled,
            "discarded": discarded,
            "salvaged": salvaged,
            "kept": kept,
            "ordered": order,
            **self._money(sold, order, kept, spoiled + discarded, unmet, salvaged),
            "next_stock": next_stock,
        }

    def _money(self, sold, order, kept, wasted, unmet, salvaged) -> dict:
        """The day's money items and reward from its counts: numbers for one shop, arrays for a batch."""
        revenue = self.price * sold
        ordering_cost = self.unit_cost * order
        holding_cost = self.holding_cost * kept
        spoilage_cost = self.spoilage_cost * wasted
        lost_sale_cost = self.lost_sale_cost * unmet
        salvage_revenue = self.salvage_value * salvaged
        return {
            "revenue": revenue,
            "ordering_cost": ordering_cost,
            "holding_cost": holding_cost,
            "spoilage_cost": spoilage_cost,
            "lost_sale_cost": lost_sale_cost,
            "salvage_revenue": salvage_revenue,
            "reward": revenue + salvage_revenue - ordering_cost - holding_cost - spoilage_cost - lost_sale_cost,
        }

    def _serve_day(self, order: int, demand: int, last_day: bool) -> tuple[float, list[int], dict]:
        """One day for one shop, in plain Python: the same arithmetic as :meth:`_serve_days`.

        The batch form defines the model; this form is the one ``step`` runs (a batch of
        one costs several times more). A test checks the two agree on every state.
        """
        shelf = [order] + self._stock_list  # ages 0..L-1
        left = list(shelf)
        unmet = demand
        for age in range(self.shelf_life - 1, -1, -1):  # oldest first
            take = min(left[age], unmet)
            left[age] -= take
            unmet -= take
        sold = demand - unmet
        leftover = sum(left)
        if last_day:
            spoiled = discarded = kept = 0
            next_stock = [0] * self.n_carried_ages
            salvaged = leftover
        else:
            aged = left[: self.n_carried_ages]
            next_stock = [min(units, self.stock_cap) for units in aged]
            spoiled = left[self.shelf_life - 1]
            discarded = sum(aged) - sum(next_stock)
            kept = sum(next_stock)
            salvaged = 0
        info = {"sold": sold, "demand": demand, "lost": unmet, "spoiled": spoiled, "discarded": discarded, "salvaged": salvaged, "kept": kept, "ordered": order}
        info.update(self._money(sold, order, kept, spoiled + discarded, unmet, salvaged))
        reward = info.pop("reward")
        return reward, next_stock, dict(info, shelf=shelf)

    def _observation(self) -> np.ndarray:
        return np.array([self._day, *self._stock_list], dtype=np.int64)

    def _info(self) -> dict:
        return {"day": self._day, "weekday": WEEKDAY_NAMES[self._day % 7] if self._day < self.horizon else None}

    def _set_stock(self, stock) -> None:
        self._stock_list = [int(units) for units in stock]
        self._stock = np.asarray(self._stock_list, dtype=np.int64)

    # ------------------------------------------------------------------ gym API
    def reset(self, *, seed: int | None = None, options: dict | None = None) -> tuple[np.ndarray, dict]:
        """Start a season on day 0 with empty shelves (the reset spends its one uniform of the protocol)."""
        super().reset(seed=seed)
        self.np_random.random()  # the start distribution has one state; the draw keeps the protocol
        self._day = 0
        self._set_stock([0] * self.n_carried_ages)
        self._last = None
        self._episode_return = 0.0
        return self._observation(), self._info()

    def step(self, action: Any) -> tuple[np.ndarray, float, bool, bool, dict]:
        if self._day >= self.horizon:
            raise RuntimeError("the season is over; call reset() before step()")
        try:
            order = int(action)
        except (TypeError, ValueError):
            order = -1
        if not 0 <= order <= self.max_order or order != action:
            raise ValueError(f"action must be an order of 0..{self.max_order} units, got {action!r}")
        cumulative = self._demand_cumulative[self._day % 7]
        demand = bisect_right(cumulative, self.np_random.random())  # the first running sum above u
        if demand == len(cumulative):
            demand = 0  # no running sum above u (rounding): the protocol's first outcome
        last_day = self._day == self.horizon - 1
        reward, next_stock, info = self._serve_day(order, demand, last_day)
        info.update(self._info())  # the day just served and its weekday
        self._last = dict(info, reward=reward)
        info.pop("shelf")
        self._set_stock(next_stock)
        self._day += 1
        self._episode_return += reward
        return self._observation(), reward, self._day >= self.horizon, False, info

    # ------------------------------------------------------------------ start control
    def start_states(self) -> list[np.ndarray]:
        """Every non-terminal observation (any day before ``horizon``, any stock), in table-index order."""
        n_live = int(np.prod(self.nvec[1:])) * self.horizon
        grid = np.stack(np.unravel_index(np.arange(n_live), (self.horizon, *self.nvec[1:])), axis=1)
        return [row.astype(np.int64) for row in grid]

    def reset_to(self, observation: Any) -> tuple[np.ndarray, dict]:
        """Start the episode in ``observation`` = ``(day, stock_age1, ...)``; no reseeding."""
        values = np.asarray(observation).reshape(-1).tolist()  # checked in plain Python: this runs once per exploring start
        if len(values) != len(self._nvec_list) or not all(type(v) is int and 0 <= v < n for v, n in zip(values, self._nvec_list)):
            raise ValueError(f"{observation!r} is not an observation of {self.observation_space}")
        if values[0] >= self.horizon:
            raise ValueError(f"day {values[0]} is the terminal layer; start days are 0..{self.horizon - 1}")
        self._day = values[0]
        self._set_stock(values[1:])
        self._last = None
        self._episode_return = 0.0
        return self._observation(), self._info()

    # ------------------------------------------------------------------ exact model
    @property
    def n_states(self) -> int:
        return int(np.prod(self.nvec))

    def tabular_model(self) -> TabularModel:
        """The exact finite-horizon model, states numbered as ``ravel_multi_index(obs, nvec)``.

        Raises :class:`~qtally.envs.model.NoModelError` above ``model_state_limit`` states.
        """
        return self.outcome_table().to_model()

    def outcome_table(self) -> OutcomeTable:
        """Every day's outcomes in sampling order: per state and order, demand ``0..max_demand``.

        Each outcome keeps its own reward (two demands may lead to the same next state with
        different profits), so a compiled engine replays ``step`` draw for draw.
        """
        n_states, n_actions = self.n_states, self.max_order + 1
        if n_states > self.model_state_limit:
            raise NoModelError(
                f"RestockEnv has {n_states} states, above model_state_limit={self.model_state_limit}; "
                "it can only be simulated"
            )
        stock_shape = tuple(int(v) for v in self.nvec[1:])
        n_stock = int(np.prod(stock_shape))
        if self.n_carried_ages:
            stock = np.stack(np.unravel_index(np.arange(n_stock), stock_shape), axis=1)
        else:
            stock = np.zeros((1, 0), dtype=np.int64)
        n_demand = self.max_demand + 1
        # One entry per (stock, action, demand), in that order: rows s * n_actions + a ascend.
        s_idx, a_idx, d_idx = (g.ravel() for g in np.meshgrid(np.arange(n_stock), np.arange(n_actions), np.arange(n_demand), indexing="ij"))
        next_states, probabilities, rewards = [], [], []
        for day in range(self.horizon):
            last = np.full(s_idx.shape, day == self.horizon - 1)
            out = self._serve_days(stock[s_idx], a_idx.astype(np.int64), d_idx.astype(np.int64), last)
            next_states.append(np.ravel_multi_index((np.full(s_idx.shape, day + 1), *out["next_stock"].T), self.nvec))
            probabilities.append(self._demand_pmfs[day % 7][d_idx])
            rewards.append(out["reward"].astype(np.float64))
        live_rows = self.horizon * n_stock * n_actions
        offsets = np.concatenate([np.arange(live_rows + 1) * n_demand, np.full(n_states * n_actions - live_rows, live_rows * n_demand)])
        next_states = np.concatenate(next_states).astype(np.int64)
        return OutcomeTable(
            n_states=n_states,
            n_actions=n_actions,
            offsets=offsets.astype(np.int64),
            next_states=next_states,
            probabilities=np.concatenate(probabilities),
            rewards=np.concatenate(rewards),
            terminated=next_states >= self.horizon * n_stock,
            start_states=np.array([0], dtype=np.int64),  # day 0, empty shelves
            start_probabilities=np.array([1.0]),
        )

    # ------------------------------------------------------------------ rendering
    def render(self):
        if self.render_mode == "ansi":
            return self._render_ansi()
        if self.render_mode == "rgb_array":
            return self._render_rgb()
        return None

    def _render_ansi(self) -> str:
        width = max(self.max_order, self.stock_cap, self.max_demand)
        lines = []
        if self._last is None:
            weekday = WEEKDAY_NAMES[self._day % 7] if self._day < self.horizon else "end"
            lines.append(f"day {self._day + 1}/{self.horizon} ({weekday}) morning   return {self._episode_return:+.2f}")
            for age, units in enumerate(self._stock, start=1):
                lines.append(f"  age{age} [{'#' * int(units)}{'.' * (width - int(units))}] {int(units)}")
            return "\n".join(lines) + "\n"
        last = self._last
        lines.append(
            f"day {last['day'] + 1}/{self.horizon} ({WEEKDAY_NAMES[last['day'] % 7]})   "
            f"reward {last['reward']:+.2f}   return {self._episode_return:+.2f}"
        )
        for age, units in enumerate(last["shelf"]):
            units = int(units)
            lines.append(f"  age{age} [{'#' * units}{'.' * max(width - units, 0)}] {units}")
        lines.append(
            f"  order {last['ordered']}  demand {last['demand']}  sold {last['sold']}  lost {last['lost']}  "
            f"spoiled {last['spoiled']}  discarded {last['discarded']}  salvaged {last['salvaged']}"
        )
        return "\n".join(lines) + "\n"

    def _render_rgb(self) -> np.ndarray:
        return _draw_frame(self)


# ---------------------------------------------------------------------- drawing
# A 3x5 pixel font for digits, enough to label bars in a GIF.
_DIGITS = {
    "0": "111101101101111", "1": "010110010010111", "2": "111001111100111", "3": "111001111001111",
    "4": "101101111001001", "5": "111100111001111", "6": "111100111101111", "7": "111001001001001",
    "8": "111101111101111", "9": "111101111001111", "-": "000000111000000", "/": "001001010100100",
}
_BACKGROUND = (245, 242, 235)
_AGE_FRESH, _AGE_OLD = np.array([70, 170, 80]), np.array([220, 140, 40])
_ORDER, _SOLD, _LOST, _SPOILED, _DEMAND = (60, 110, 200), (40, 140, 60), (200, 50, 50), (120, 80, 40), (90, 90, 90)


def _text(img: np.ndarray, x: int, y: int, label: str, colour=(30, 30, 30), scale: int = 2) -> None:
    for ch in label:
        glyph = _DIGITS.get(ch)
        if glyph is not None:
            bits = np.array([int(b) for b in glyph], dtype=bool).reshape(5, 3)
            block = np.kron(bits, np.ones((scale, scale), dtype=bool))
            h, w = block.shape
            region = img[y : y + h, x : x + w]
            region[block[: region.shape[0], : region.shape[1]]] = colour
        x += 4 * scale


def _bar(img: np.ndarray, x: int, base: int, units: int, unit_px: int, width: int, colour, outline: bool = False) -> None:
    """A bar of ``units`` stacked unit blocks standing on row ``base``."""
    for k in range(int(units)):
        top = base - (k + 1) * unit_px
        if outline:
            img[top, x : x + width] = colour
            img[top + unit_px - 1, x : x + width] = colour
            img[top : top + unit_px, x] = colour
            img[top : top + unit_px, x + width - 1] = colour
        else:
            img[top + 1 : top + unit_px, x : x + width] = colour


def _draw_frame(env: RestockEnv) -> np.ndarray:
    """One labelled frame, 640 x 400 pixels: the day, the shelf by age, the order, demand, sales, losses, spoilage and the money so far."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    weekdays = ("Mon", "Tue", "Wed", "Thu", "Fri", "Sat", "Sun")
    fig, ax = plt.subplots(figsize=(6.4, 4.0), dpi=100)
    try:
        if env._last is not None:
            day = int(env._last["day"])
            shelf = [int(x) for x in env._last["shelf"]]
            counts = [int(env._last[k]) for k in ("ordered", "demand", "sold", "lost", "spoiled")]
            heading = f"day {day + 1} of {env.horizon} ({weekdays[day % 7]}): ordered {counts[0]}, demand {counts[1]}"
        else:
            day = min(env._day, env.horizon - 1)
            shelf = [0] + [int(x) for x in env._stock]
            counts = [0, 0, 0, 0, 0]
            heading = f"day {day + 1} of {env.horizon} ({weekdays[day % 7]}): the morning, before the first order"
        labels = [f"age {age}" for age in range(len(shelf))] + ["ordered", "demand", "sold", "lost", "spoiled"]
        values = shelf + counts
        colours = ["#46aa50"] * len(shelf) + ["#3c6ec8", "#a0a0a0", "#288c3c", "#c83232", "#785028"]
        bars = ax.bar(range(len(values)), values, color=colours)
        ax.bar_label(bars, [str(v) for v in values], fontsize=9)
        ax.set_xticks(range(len(values)), labels, fontsize=9)
        ax.axvline(len(shelf) - 0.5, color="#666666", lw=0.8, ls=":")
        ax.set_ylim(0, max(env.max_order, env.stock_cap, env.max_demand, 1) + 1)
        ax.set_ylabel("units")
        ax.set_title(f"{heading}\nshelf on sale today (age 0 = today's delivery) | the day's flows    profit so far: {env._episode_return:.2f}", fontsize=9)
        fig.tight_layout()
        fig.canvas.draw()
        frame = np.asarray(fig.canvas.buffer_rgba())[:, :, :3].copy()
    finally:
        plt.close(fig)
    return frame


# ---------------------------------------------------------------------- registration and presets
def register_restock() -> None:
    """Register ``qtally/Restock-v0`` with Gymnasium; calling it again does nothing."""
    if RESTOCK_ID not in gym.registry:
        gym.register(id=RESTOCK_ID, entry_point="qtally.envs.restock:RestockEnv")


def make_newsvendor_kwargs(
    mean_demand: float = 6.0,
    price: float = 5.0,
    unit_cost: float = 2.0,
    max_order: int | None = None,
    max_demand: int | None = None,
) -> dict:
    """Constructor arguments for a one-day season: the classic single-period newsvendor.

    One day, every weekday with the same demand mean, no holding, spoilage or lost-sale
    cost and no salvage, so the expected profit of ordering ``q`` is
    ``price * E[min(q, D)] - unit_cost * q``. ``max_order`` and ``max_demand`` default to
    values far enough above the mean that they do not bind. Defaults are invented.

    >>> kw = make_newsvendor_kwargs(mean_demand=4.0)
    >>> kw["horizon"], kw["holding_cost"], kw["salvage_value"], kw["max_order"] >= 4
    (1, 0.0, 0.0, True)
    """
    if max_demand is None:
        max_demand = int(stats.poisson.ppf(1 - 1e-9, mean_demand)) + 1
    if max_order is None:
        max_order = max_demand
    return {
        "horizon": 1,
        "shelf_life": 1,
        "max_order": int(max_order),
        "price": float(price),
        "unit_cost": float(unit_cost),
        "holding_cost": 0.0,
        "spoilage_cost": 0.0,
        "lost_sale_cost": 0.0,
        "salvage_value": 0.0,
        "weekly_demand_means": (float(mean_demand),) * 7,
        "max_demand": int(max_demand),
    }
