"""Forewarn: a horn sounds a fixed delay before a cold squall; prepare in time or suffer it."""

from __future__ import annotations

from typing import Any

import numpy as np
from gymnasium import spaces

from needbench.envs import rendering
from needbench.envs.compiled import inline_kernel, kernel
from needbench.envs.engine import (
    AMBIENT,
    COUNTERS,
    FORCING,
    INTAKE,
    KEYS,
    OBSERVATION,
    OPTIONS,
    WORLD_OFFSET,
    observe_internal,
    reset_body,
    settle_all,
)
from needbench.envs.errors import ConfigError, check_finite, check_non_negative, check_range
from needbench.envs.physiology import Physiology
from needbench.envs.streams import draw_uniform
from needbench.envs.task import NeedEnv, NeedVectorEnv, World

#: What the actions do, in order (the index is the action).
ACTIONS = ("rest", "eat", "drink", "put on oilskin", "take off oilskin")
REST, EAT, DRINK, PUT_ON, TAKE_OFF = range(len(ACTIONS))

#: ``since_cue`` of a copy with no warning or squall under way.
IDLE = -1


def _whole_number(path: str, value: Any, low: int) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < low:
        raise ConfigError(path, value, f"a whole number >= {low}")
    return int(value)


@inline_kernel
def weather_step(b, action, since_cue, coat, probability, event_length, keys, counters):
    """Advance copy ``b``'s oilskin and warning clock one step; return whether the horn sounds.

    One uniform per copy per step, drawn whatever the weather and used only
    by a calm copy (so that every copy draws the same count).
    """
    if action == PUT_ON:
        coat[b] = True
    elif action == TAKE_OFF:
        coat[b] = False
    since = since_cue[b]
    if since >= 0:
        since += 1
    if since >= event_length:
        since = IDLE
    u = draw_uniform(keys, counters, b)
    cue = since == IDLE and u < probability
    if cue:
        since = 0
    since_cue[b] = since
    return cue


@inline_kernel
def observe_weather(b, since_cue, coat, event_length, clock, engine):
    """Copy ``b``'s observation: deviations, then cue, time since the cue (if shown), coat."""
    observe_internal(engine, b)
    observation = engine[OBSERVATION]
    offset = int(engine[OPTIONS][WORLD_OFFSET])
    since = since_cue[b]
    observation[b, offset] = np.float32(1.0 if since == 0 else 0.0)
    column = offset + 1
    if clock:
        # Fraction of the warning-plus-squall span gone by; 1 when none is under way.
        observation[b, column] = np.float32(since / event_length if since >= 0 else 1.0)
        column += 1
    observation[b, column] = np.float32(1.0 if coat[b] else 0.0)


@kernel
def _reset(mask, constants, state, engine):
    _, event_length, _, _, _, _, _, _, _, clock = constants
    since_cue, coat = state
    for b in range(mask.shape[0]):
        if mask[b]:
            reset_body(engine, b)
            since_cue[b] = IDLE
            coat[b] = False
            observe_weather(b, since_cue, coat, event_length, clock, engine)


@kernel
def _step(actions, constants, state, events, engine):
    (warning_delay, event_length, probability, shield, ambient_default, chill, meal, drink,
     coat_cost, clock) = constants
    since_cue, coat = state
    cue_event, squall_event, prepared_event = events
    intake, ambient, forcing = engine[INTAKE], engine[AMBIENT], engine[FORCING]
    keys, counters = engine[KEYS], engine[COUNTERS]
    for b in range(actions.shape[0]):
        action = actions[b]
        cue = weather_step(b, action, since_cue, coat, probability, event_length, keys, counters)
        since = since_cue[b]
        squall = since >= warning_delay and since < event_length
        worn = 1.0 if coat[b] else 0.0
        # The old engine's order: exposure = squall * (1 - shield * coat), then
        # ambient - exposure * chill, intake = eat * meal + drink * water.
        exposure = (1.0 if squall else 0.0) * (1.0 - shield * worn)
        eat = 1.0 if action == EAT else 0.0
        sip = 1.0 if action == DRINK else 0.0
        for k in range(intake.shape[1]):
            ambient[b, k] = ambient_default[k] - exposure * chill[k]
            intake[b, k] = eat * meal[k] + sip * drink[k]
            forcing[b, k] = -(worn * coat_cost[k])
        cue_event[b] = cue
        squall_event[b] = squall
        prepared_event[b] = coat[b]
    settle_all(engine)
    for b in range(actions.shape[0]):
        observe_weather(b, since_cue, coat, event_length, clock, engine)


@kernel
def _observe(constants, state, engine):
    _, event_length, _, _, _, _, _, _, _, clock = constants
    since_cue, coat = state
    for b in range(since_cue.shape[0]):
        observe_weather(b, since_cue, coat, event_length, clock, engine)


class ForewarnWorld(World):
    """Random warnings, each followed after exactly ``warning_delay`` steps by a squall.

    State: ``since_cue`` (B,) steps since the current warning sounded
    (:data:`IDLE` when none is under way) and ``coat`` (B,) whether the
    oilskin is worn. On the step a warning sounds ``since_cue`` is 0; the
    squall blows while ``warning_delay <= since_cue < warning_delay +
    squall_length``; a new warning can sound only when the last squall is over.
    Events in ``info``: ``cue``, ``disturbance`` (the squall blew) and
    ``prepared`` (the oilskin was worn), all bool.
    """

    parameters = {
        "warning_delay": 10,
        "squall_length": 20,
        "warning_probability": 0.03,
        "chill": 6.0,
        "disturbed_need": "temperature",
        "shield": 1.0,
        "coat_cost": 0.02,
        "meal": 0.5,
        "drink": 0.5,
        "clock": True,
    }
    reset_kernel = staticmethod(_reset)
    step_kernel = staticmethod(_step)
    observe_kernel = staticmethod(_observe)
    uses_ambient = True

    def __init__(self, physiology: Physiology, warning_delay: int = 10, squall_length: int = 20,
                 warning_probability: float = 0.03, chill: float = 6.0,
                 disturbed_need: str = "temperature", shield: float = 1.0,
                 coat_cost: float = 0.02, meal: float = 0.5, drink: float = 0.5,
                 clock: bool = True):
        super().__init__(physiology)
        self.warning_delay = _whole_number("warning_delay", warning_delay, 1)
        self.squall_length = _whole_number("squall_length", squall_length, 1)
        self.warning_probability = check_range("warning_probability", warning_probability,
                                               0.0, 1.0)
        self.chill = check_finite("chill", chill)
        if disturbed_need not in physiology.index:
            raise ConfigError("disturbed_need", disturbed_need,
                              "a need of this body: " + ", ".join(physiology.names))
        if physiology.ambient_rate[physiology.index[disturbed_need]] <= 0:
            raise ConfigError("disturbed_need", disturbed_need,
                              "a need that relaxes toward ambient (ambient_rate > 0)")
        self.disturbed_need = disturbed_need
        self.shield = check_range("shield", shield, 0.0, 1.0)
        self.coat_cost = check_non_negative("coat_cost", coat_cost)
        self.meal = check_non_negative("meal", meal)
        self.drink = check_non_negative("drink", drink)
        if not isinstance(clock, (bool, np.bool_)):
            raise ConfigError("clock", clock, "True or False")
        self.clock = bool(clock)
        self.event_length = self.warning_delay + self.squall_length
        band = physiology.band
        # (K,) per-step vectors in need units; a body without energy or water
        # simply gains nothing from eating or drinking.
        self.chill_vector = np.zeros(physiology.num_needs)
        self.chill_vector[physiology.index[disturbed_need]] = self.chill
        self.chill_vector *= band
        self.meal_vector = self._on("energy", self.meal) * band
        self.drink_vector = self._on("water", self.drink) * band
        self.coat_cost_vector = self._on("energy", self.coat_cost) * band
        self.action_space = spaces.Discrete(len(ACTIONS))
        names = ["cue"] + (["time_since_cue"] if self.clock else []) + ["coat"]
        self.feature_names = tuple(names)
        self.feature_low = np.zeros(len(names))
        self.feature_high = np.ones(len(names))

    def _on(self, need: str, value: float) -> np.ndarray:
        out = np.zeros(self.physiology.num_needs)
        if need in self.physiology.index:
            out[self.physiology.index[need]] = value
        return out

    def constants(self) -> tuple:
        return (self.warning_delay, self.event_length, self.warning_probability, self.shield,
                self.physiology.ambient, self.chill_vector, self.meal_vector, self.drink_vector,
                self.coat_cost_vector, self.clock)

    def allocate(self, batch: int) -> dict[str, np.ndarray]:
        return {"since_cue": np.full(batch, IDLE, np.int64), "coat": np.zeros(batch, np.bool_)}

    def allocate_events(self, batch: int) -> dict[str, np.ndarray]:
        return {"cue": np.zeros(batch, np.bool_), "disturbance": np.zeros(batch, np.bool_),
                "prepared": np.zeros(batch, np.bool_)}

    def model(self) -> dict[str, Any]:
        """The action model, for controllers: ``actions`` names, ``probabilities``
        (A, 1) ones and ``effects`` (A, 1, K), what each action delivers at
        once, in need units (eating goes through the gut; the oilskin's
        energy cost per worn step is ``coat_cost_vector``); ``shelter``: the
        oilskin, as ``need`` (the disturbed need), ``direction`` (-1: the
        squall lowers it, +1: raises it), ``put_on`` and ``take_off`` (action
        indices) and ``worn_feature`` (the world feature that shows it worn).
        ``stationary`` is False: the weather is not in the model, so no exact
        finite model is built from it."""
        effects = np.zeros((len(ACTIONS), 1, self.physiology.num_needs))
        effects[EAT, 0] = self.meal_vector
        effects[DRINK, 0] = self.drink_vector
        return {"actions": ACTIONS, "probabilities": np.ones((len(ACTIONS), 1)),
                "effects": effects, "coat_cost_vector": self.coat_cost_vector,
                "shelter": {"need": self.disturbed_need,
                            "direction": -1 if self.chill >= 0 else 1,
                            "put_on": PUT_ON, "take_off": TAKE_OFF, "worn_feature": "coat"},
                "stationary": False}

    def weather(self, state, index) -> tuple[str, str]:
        """(phase, words) of copy ``index``: phase ``calm``, ``warned`` (the horn has
        sounded, the squall is still to come) or ``squall``."""
        since = int(state["since_cue"][index])
        if since == IDLE:
            return "calm", "calm"
        if since < self.warning_delay:
            return "warned", (f"horn sounded {since} steps ago; squall in "
                              f"{self.warning_delay - since} steps")
        return "squall", f"squall blowing, {self.event_length - since} steps left"

    def text(self, state, index):
        coat = "worn" if state["coat"][index] else "off"
        return f"weather: {self.weather(state, index)[1]}\noilskin: {coat}"

    def image(self, state, index):
        """(256, 432, 3) uint8: the moor under the sky of the phase (clear when calm,
        darkening once the horn has sounded, grey with sleet in the squall), the horn on
        its post with sound waves while its warning runs, and the shepherd in the agent
        colour, in a yellow oilskin when it is worn; the words of :meth:`weather` below."""
        phase, words = self.weather(state, index)
        height, width, horizon = 256, 432, 180
        picture = np.empty((height, width, 3), np.float64)
        sky = {"calm": (150, 195, 235), "warned": (115, 135, 165), "squall": (78, 84, 100)}
        picture[:horizon] = sky[phase]
        picture[horizon:] = (92, 108, 62)
        rows, columns = np.mgrid[0:height, 0:width]
        if phase == "squall":  # slanted sleet over the sky and moor
            sleet = ((columns + rows // 2) % 18 == 0) & (rows % 7 < 4)
            picture[sleet] = (225, 230, 240)
        # The horn: a brass cone on a post, its bell to the right.
        picture[96:horizon, 40:46] = (90, 70, 50)
        cone = (columns >= 40) & (columns <= 104) & \
            (np.abs(rows - 92) <= 3 + (columns - 40) * 0.22)
        picture[cone] = (205, 165, 60)
        if phase == "warned":
            distance = np.hypot(rows - 92, columns - 104)
            waves = (columns > 106) & (np.abs(rows - 92) < (columns - 100)) & \
                np.isin(np.round(distance).astype(int) % 14, (0, 1)) & (distance < 60)
            picture[waves] = (250, 235, 140)
        # The shepherd.
        centre = 372
        coat = bool(state["coat"][index])
        head = np.hypot(rows - 108, columns - centre)
        body = (rows >= 124) & (rows < horizon + 6) & (np.abs(columns - centre) <= 18)
        outline = (rows >= 121) & (rows < horizon + 9) & (np.abs(columns - centre) <= 21)
        picture[outline | (head <= 15)] = rendering.AGENT_OUTLINE
        picture[body | (head <= 12)] = rendering.AGENT_COLOUR
        if coat:
            oilskin = (245, 205, 40)
            picture[body & (np.abs(columns - centre) >= 3)] = oilskin
            hood = (head <= 14) & (head > 9) & (rows <= 112)
            picture[hood] = oilskin
        picture = picture.astype(np.uint8)
        lines = words.split("; ") + ["oilskin: " + ("worn" if coat else "off")]
        for i, line in enumerate(lines):
            rendering.draw_text(picture, line, horizon + 8 + 20 * i, 8)
        return picture


class ForewarnEnv(NeedEnv):
    """Forewarn: a horn warns of a cold squall a fixed delay ahead; prepare or suffer it.

    ## Description
    A shepherd in an invented moorland bothy keeps energy, water and core
    temperature in their bands. Now and then a lookout's horn sounds (the
    cue); exactly ``warning_delay`` steps (10) later a cold squall blows for
    ``squall_length`` steps (20), lowering the ambient temperature by
    ``chill`` bands (6). An oilskin keeps the squall out (``shield`` = 1: all
    of it), but it is heavy: while worn it costs ``coat_cost`` bands of energy
    per step (0.02, as much as basal drain). Put on when the horn sounds, the
    oilskin spares the body the squall; put on only once the body feels cold,
    it stops the fall, but the temperature climbs back slowly (thermal
    inertia). The task probes anticipation: acting on a predictive cue before
    the deviation appears.

    ## Action Space
    ``Discrete(5)``: 0 rest, 1 eat (``meal`` bands of energy, 0.5, through the
    gut), 2 drink (``drink`` bands of water, 0.5), 3 put on the oilskin,
    4 take it off. The oilskin stays as it is until changed.

    ## Observation Space
    ``Box(float32)``: the K internal deviations (h - h*)/band; ``cue`` (1 on
    the step the horn sounds, else 0); with ``clock`` (default) the time since
    the horn as a fraction of ``warning_delay + squall_length`` (1 when no
    warning or squall is under way); ``coat`` (1 while worn). With
    ``clock=False`` the agent must remember when the horn sounded.

    ## Rewards
    By default drive reduction r_t = D(h_t) - D(h_{t+1}) with the homeostatic
    drive (n = 3, m = 2) on band-scaled deviations. See ``reward``.

    ## Starting State
    Levels uniform within half a band of the set points; gut empty; calm
    weather; oilskin off.

    ## Episode End
    Termination when a need leaves its lethal bounds (+-6 bands); truncation
    at ``max_steps`` (400).

    ## Arguments
    * ``warning_delay`` (10), ``squall_length`` (20): steps, whole numbers >= 1.
    * ``warning_probability``: chance per calm step that the horn sounds (0.03).
    * ``chill``: bands by which the squall lowers the ambient of
      ``disturbed_need`` (default ``temperature``; it must relax toward
      ambient). Negative values make a heat wave.
    * ``shield``: fraction of the chill the oilskin keeps out, in [0, 1].
    * ``coat_cost``, ``meal``, ``drink``: bands per step / per action, >= 0.
    * ``clock``: include the time since the horn in the observation.
    * the common task arguments (``needbench.envs.task``).

    Every step's ``info`` carries ``cue`` (the horn sounded this step),
    ``disturbance`` (the squall blew this step) and ``prepared`` (the oilskin
    was worn this step), all bool.

    ## Vectorized environment
    ``gymnasium.make_vec("needbench/Forewarn-v0", num_envs=N,
    vectorization_mode="vector_entry_point")`` gives :class:`ForewarnVectorEnv`.

    ## Version History
    * v0: initial version.
    """

    world_cls = ForewarnWorld
    defaults = {"max_steps": 400}


class ForewarnVectorEnv(NeedVectorEnv):
    """Native vector version of :class:`ForewarnEnv` (same core, B = num_envs)."""

    world_cls = ForewarnWorld
    defaults = ForewarnEnv.defaults
