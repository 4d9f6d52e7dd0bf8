"""Double DQN in numpy: a small Q-network trained from a replay buffer, readable top to bottom.

The learner is DQN (Mnih et al. 2015) with the Double DQN target (van Hasselt et al. 2016): the
online network chooses the next action, the target network values it,

    y = r + gamma * (1 - done) * Q_target(s', argmax_a Q_online(s', a)).

The Q-network is a multilayer perceptron with two ReLU hidden layers, fitted with the Huber
loss and Adam (Kingma & Ba 2015). Inputs are standardised with a mean and standard deviation
estimated once from the warm-up transitions (random actions) and then frozen, so the exported
ONNX graph can bake the same normalisation in front of the network.

Entry point: :func:`train` takes a :class:`DQNConfig` and a gymnasium environment with a
``Box`` observation space and a ``Discrete`` action space, and returns a :class:`TrainResult`
holding the trained :class:`QNetwork` and the learning curve.
"""

from __future__ import annotations

import csv
import dataclasses
import json
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

# --------------------------------------------------------------------------------------------
# Configuration


@dataclass(frozen=True)
class DQNConfig:
    """Hyperparameters of one training run (saved as JSON beside every trained policy).

    Each field's ``metadata["help"]`` is its one-line documentation (with the unit); the CLI
    generates one ``--flag`` per field from it.
    """

    seed: int = field(
        default=0, metadata={"help": "seed of the network init, exploration and replay sampling"}
    )
    episodes: int = field(default=12_000, metadata={"help": "training episodes (episodes)"})
    hidden_units: int = field(
        default=64, metadata={"help": "units in each of the two hidden layers (units)"}
    )
    learning_rate: float = field(default=2.5e-4, metadata={"help": "Adam step size (1)"})
    gamma: float = field(
        default=1.0, metadata={"help": "discount factor per decision step (1 = undiscounted)"}
    )
    batch_size: int = field(default=128, metadata={"help": "transitions per gradient update"})
    buffer_size: int = field(
        default=50_000, metadata={"help": "replay buffer capacity (transitions)"}
    )
    learning_starts: int = field(
        default=1_000,
        metadata={
            "help": "random-action steps before the first update; input normalisation is "
            "estimated from them (environment steps)"
        },
    )
    train_every: int = field(
        default=1, metadata={"help": "environment steps between gradient updates (steps)"}
    )
    target_update_every: int = field(
        default=500, metadata={"help": "gradient updates between target-network copies (updates)"}
    )
    epsilon_start: float = field(default=1.0, metadata={"help": "initial exploration rate (1)"})
    epsilon_end: float = field(default=0.05, metadata={"help": "final exploration rate (1)"})
    exploration_fraction: float = field(
        default=0.3,
        metadata={"help": "share of the episodes over which epsilon decays linearly (1)"},
    )
    huber_delta: float = field(
        default=1.0, metadata={"help": "Huber loss threshold on the TD error (reward units)"}
    )
    max_grad_norm: float = field(
        default=10.0, metadata={"help": "global gradient-norm clip per update (1)"}
    )
    bootstrap_on_truncation: bool = field(
        default=False,
        metadata={
            "help": "bootstrap the value after a truncated step (off when the time left is "
            "part of the observation, so a spent contract is a true end)"
        },
    )
    eval_every_episodes: int = field(
        default=500,
        metadata={
            "help": "episodes between greedy evaluations on fixed validation episodes; the "
            "best-evaluated network is returned (0 = off, keep the last network)"
        },
    )

    def __post_init__(self) -> None:
        problems = []
        for name in (
            "episodes",
            "hidden_units",
            "batch_size",
            "buffer_size",
            "train_every",
            "target_update_every",
        ):
            if getattr(self, name) < 1:
                problems.append(f"{name} must be >= 1, got {getattr(self, name)}")
        if self.learning_starts < 0 or self.eval_every_episodes < 0:
            problems.append("learning_starts and eval_every_episodes must be >= 0")
        if not self.learning_rate > 0:
            problems.append(f"learning_rate must be > 0, got {self.learning_rate}")
        if not 0.0 <= self.gamma <= 1.0:
            problems.append(f"gamma must be in [0, 1], got {self.gamma}")
        for name in ("epsilon_start", "epsilon_end", "exploration_fraction"):
            if not 0.0 <= getattr(self, name) <= 1.0:
                problems.append(f"{name} must be in [0, 1], got {getattr(self, name)}")
        if not self.huber_delta > 0 or not self.max_grad_norm > 0:
            problems.append("huber_delta and max_grad_norm must be > 0")
        if problems:
            raise ValueError("invalid DQN config: " + "; ".join(problems))

    def to_dict(self) -> dict[str, Any]:
        return dataclasses.asdict(self)


def epsilon_at(progress: float, config: DQNConfig) -> float:
    """Exploration rate after ``progress`` (0..1) of the episodes: linear decay, then flat."""
    if config.exploration_fraction <= 0.0:
        return config.epsilon_end
    t = min(max(progress / config.exploration_fraction, 0.0), 1.0)
    return config.epsilon_start + t * (config.epsilon_end - config.epsilon_start)


# --------------------------------------------------------------------------------------------
# The Q-network: parameters are a dict of float64 arrays; functions below are pure.

Params = dict[str, np.ndarray]
PARAM_NAMES = ("w1", "b1", "w2", "b2", "w3", "b3")


def init_params(rng: np.random.Generator, n_in: int, n_hidden: int, n_out: int) -> Params:
    """He-uniform weights for the ReLU layers, zero biases; small last layer (common practice)."""

    def he(fan_in: int, fan_out: int, scale: float = 1.0) -> np.ndarray:
        limit = scale * np.sqrt(6.0 / fan_in)
        return rng.uniform(-limit, limit, size=(fan_in, fan_out))

    return {
        "w1": he(n_in, n_hidden),
        "b1": np.zeros(n_hidden),
        "w2": he(n_hidden, n_hidden),
        "b2": np.zeros(n_hidden),
        "w3": he(n_hidden, n_out, scale=0.1),
        "b3": np.zeros(n_out),
    }


def forward(params: Params, x: np.ndarray) -> tuple[np.ndarray, tuple[np.ndarray, ...]]:
    """Q-values of a batch of (already normalised) inputs.

    Parameters
    ----------
    x : float[B, n_in]

    Returns
    -------
    q : float64[B, n_out]
    cache : the pre-activations and activations :func:`backward` needs
    """
    z1 = x @ params["w1"] + params["b1"]
    h1 = np.maximum(z1, 0.0)
    z2 = h1 @ params["w2"] + params["b2"]
    h2 = np.maximum(z2, 0.0)
    q = h2 @ params["w3"] + params["b3"]
    return q, (x, z1, h1, z2, h2)


def backward(params: Params, cache: tuple[np.ndarray, ...], dq: np.ndarray) -> Params:
    """Gradients of a loss with respect to every parameter, given ``dq = dloss/dq`` [B, n_out]."""
    x, z1, h1, z2, h2 = cache
    dh2 = dq @ params["w3"].T
    dz2 = dh2 * (z2 > 0.0)
    dh1 = dz2 @ params["w2"].T
    dz1 = dh1 * (z1 > 0.0)
    return {
        "w3": h2.T @ dq,
        "b3": dq.sum(axis=0),
        "w2": h1.T @ dz2,
        "b2": dz2.sum(axis=0),
        "w1": x.T @ dz1,
        "b1": dz1.sum(axis=0),
    }


def huber_grad(error: np.ndarray, delta: float) -> tuple[float, np.ndarray]:
    """Mean Huber loss of ``error`` [B] and its gradient with respect to ``error``."""
    abs_e = np.abs(error)
    quad = np.minimum(abs_e, delta)
    loss = float(np.mean(0.5 * quad**2 + delta * (abs_e - quad)))
    return loss, np.clip(error, -delta, delta) / error.shape[0]


@dataclass
class AdamState:
    """First and second moment estimates per parameter, and the step count."""

    m: Params
    v: Params
    t: int = 0

    @classmethod
    def zeros_like(cls, params: Params) -> AdamState:
        return cls(
            m={k: np.zeros_like(p) for k, p in params.items()},
            v={k: np.zeros_like(p) for k, p in params.items()},
        )


def adam_step(
    params: Params,
    grads: Params,
    state: AdamState,
    lr: float,
    beta1: float = 0.9,
    beta2: float = 0.999,
    eps: float = 1e-8,
) -> None:
    """One in-place Adam update (Kingma & Ba 2015, Algorithm 1, with bias correction)."""
    state.t += 1
    c1 = 1.0 - beta1**state.t
    c2 = 1.0 - beta2**state.t
    for k in params:
        g = grads[k]
        state.m[k] *= beta1
        state.m[k] += (1.0 - beta1) * g
        state.v[k] *= beta2
        state.v[k] += (1.0 - beta2) * g * g
        params[k] -= lr * (state.m[k] / c1) / (np.sqrt(state.v[k] / c2) + eps)


def clip_by_global_norm(grads: Params, max_norm: float) -> float:
    """Scale ``grads`` in place so their joint L2 norm is at most ``max_norm``; return the norm."""
    norm = float(np.sqrt(sum(float(np.sum(g * g)) for g in grads.values())))
    if norm > max_norm:
        for g in grads.values():
            g *= max_norm / norm
    return norm


@dataclass
class QNetwork:
    """A trained Q-network with its frozen input normalisation: ``q = mlp((x - mean) / std)``.

    Attributes
    ----------
    params : dict of float64 arrays ``w1 [n_in, H]``, ``b1 [H]``, ``w2 [H, H]``, ``b2 [H]``,
        ``w3 [H, n_actions]``, ``b3 [n_actions]``
    obs_mean, obs_std : float64[n_in]
        Standardisation applied to raw observations (``std`` is never below 1e-6).
    """

    params: Params
    obs_mean: np.ndarray
    obs_std: np.ndarray

    @property
    def n_inputs(self) -> int:
        return int(self.params["w1"].shape[0])

    @property
    def n_actions(self) -> int:
        return int(self.params["w3"].shape[1])

    @property
    def hidden_units(self) -> int:
        return int(self.params["w1"].shape[1])

    def normalise(self, x: np.ndarray) -> np.ndarray:
        return (np.asarray(x, dtype=np.float64) - self.obs_mean) / self.obs_std

    def q_values(self, x: np.ndarray) -> np.ndarray:
        """float64[B, n_actions] for raw observations ``x`` float[B, n_in] (or one [n_in])."""
        x = np.asarray(x, dtype=np.float64)
        q, _ = forward(self.params, self.normalise(x.reshape(-1, self.n_inputs)))
        return q if x.ndim == 2 else q[0]

    def greedy(self, x: np.ndarray) -> int:
        return int(np.argmax(self.q_values(np.asarray(x).reshape(-1))))

    def copy(self) -> QNetwork:
        return QNetwork(
            {k: v.copy() for k, v in self.params.items()},
            self.obs_mean.copy(),
            self.obs_std.copy(),
        )


def normalisation_from(obs: np.ndarray, min_std: float = 1e-6) -> tuple[np.ndarray, np.ndarray]:
    """Mean and standard deviation per column of ``obs`` float[N, n_in]; constant columns get 1."""
    mean = obs.mean(axis=0)
    std = obs.std(axis=0)
    std = np.where(std < min_std, 1.0, std)
    return mean.astype(np.float64), std.astype(np.float64)


# --------------------------------------------------------------------------------------------
# Replay buffer


class ReplayBuffer:
    """Fixed-capacity ring buffer of transitions ``(obs, action, reward, next_obs, done)``.

    Invariant: the first ``size`` rows are valid; ``cursor`` is the row written next. ``done``
    is 1 when no value follows ``next_obs`` (terminal, or truncated without bootstrapping).
    """

    def __init__(self, capacity: int, n_obs: int) -> None:
        self.obs = np.zeros((capacity, n_obs), dtype=np.float32)
        self.next_obs = np.zeros((capacity, n_obs), dtype=np.float32)
        self.action = np.zeros(capacity, dtype=np.int64)
        self.reward = np.zeros(capacity, dtype=np.float64)
        self.done = np.zeros(capacity, dtype=np.float64)
        self.capacity = capacity
        self.size = 0
        self.cursor = 0

    def add(self, obs: Any, action: int, reward: float, next_obs: Any, done: bool) -> None:
        i = self.cursor
        self.obs[i] = obs
        self.action[i] = action
        self.reward[i] = reward
        self.next_obs[i] = next_obs
        self.done[i] = float(done)
        self.cursor = (i + 1) % self.capacity
        self.size = min(self.size + 1, self.capacity)

    def sample(self, rng: np.random.Generator, batch_size: int) -> tuple[np.ndarray, ...]:
        idx = rng.integers(0, self.size, size=batch_size)
        return self.obs[idx], self.action[idx], self.reward[idx], self.next_obs[idx], self.done[idx]


# --------------------------------------------------------------------------------------------
# One gradient step


def double_dqn_targets(
    online: QNetwork,
    target: QNetwork,
    reward: np.ndarray,
    next_obs: np.ndarray,
    done: np.ndarray,
    gamma: float,
) -> np.ndarray:
    """Double DQN regression targets: the online net picks a', the target net values it."""
    next_online = online.q_values(next_obs)
    next_target = target.q_values(next_obs)
    best = np.argmax(next_online, axis=1)
    next_value = next_target[np.arange(len(best)), best]
    return reward + gamma * (1.0 - done) * next_value


def update(
    online: QNetwork,
    target: QNetwork,
    adam: AdamState,
    batch: tuple[np.ndarray, ...],
    config: DQNConfig,
) -> tuple[float, float]:
    """One Adam step on the Huber TD loss of ``batch``; returns (loss, mean Q of taken actions)."""
    obs, action, reward, next_obs, done = batch
    y = double_dqn_targets(online, target, reward, next_obs, done, config.gamma)
    q, cache = forward(online.params, online.normalise(obs))
    rows = np.arange(len(action))
    q_taken = q[rows, action]
    loss, d_err = huber_grad(q_taken - y, config.huber_delta)
    dq = np.zeros_like(q)
    dq[rows, action] = d_err
    grads = backward(online.params, cache, dq)
    clip_by_global_norm(grads, config.max_grad_norm)
    adam_step(online.params, grads, adam, config.learning_rate)
    return loss, float(np.mean(q_taken))


# --------------------------------------------------------------------------------------------
# Training loop


@dataclass
class TrainResult:
    """What :func:`train` returns.

    ``curve`` has one row per episode: ``episode``, ``env_steps``, ``episode_return``,
    ``epsilon``, ``loss`` (mean over the episode's updates, NaN before learning starts),
    ``q_mean`` and ``eval_return`` (NaN where no evaluation ran).
    """

    network: QNetwork
    config: DQNConfig
    curve: list[dict[str, float]]
    env_steps: int
    updates: int
    seconds: float
    best_eval_return: float | None = None
    best_eval_episode: int | None = None


def train(
    config: DQNConfig,
    env: Any,
    *,
    eval_fn: Callable[[QNetwork], float] | None = None,
    progress: bool = True,
    progress_desc: str = "training",
) -> TrainResult:
    """Train a Double DQN agent on ``env``.

    Parameters
    ----------
    config : DQNConfig
    env : gymnasium.Env
        ``Box`` observations of shape ``(n,)`` and a ``Discrete`` action space.
    eval_fn : callable, optional
        ``eval_fn(network) -> mean greedy return`` on fixed validation episodes, called every
        ``config.eval_every_episodes`` episodes; the best-scoring network is returned.
    progress : bool
        Show a tqdm progress bar (stderr).

    Notes
    -----
    Everything random comes from ``config.seed``: the network init, exploration and replay
    sampling use one numpy generator, and the environment is reset with the same seed once
    (later resets continue its own generator), so a run is reproducible.
    """
    from threadpoolctl import threadpool_limits
    from tqdm import tqdm

    # The matrices are tiny: a multi-threaded BLAS only adds synchronisation, and on a shared
    # machine it can make an update several times slower (measured 2.6x at batch 128).
    with threadpool_limits(limits=1):
        return _train(config, env, eval_fn, progress, progress_desc, tqdm)


def _train(
    config: DQNConfig,
    env: Any,
    eval_fn: Callable[[QNetwork], float] | None,
    progress: bool,
    progress_desc: str,
    tqdm: Any,
) -> TrainResult:
    started = time.perf_counter()
    rng = np.random.default_rng(config.seed)
    obs, _ = env.reset(seed=config.seed)
    n_obs = int(np.asarray(obs).shape[0])
    n_actions = int(env.action_space.n)

    online = QNetwork(
        init_params(rng, n_obs, config.hidden_units, n_actions), np.zeros(n_obs), np.ones(n_obs)
    )
    target = online.copy()
    adam = AdamState.zeros_like(online.params)
    buffer = ReplayBuffer(config.buffer_size, n_obs)
    normalised = False

    curve: list[dict[str, float]] = []
    best: QNetwork | None = None
    best_eval: float | None = None
    best_episode: int | None = None
    env_steps = 0
    updates = 0
    recent: list[float] = []

    bar = tqdm(
        range(config.episodes),
        desc=progress_desc,
        disable=not progress,
        mininterval=0.5,
        dynamic_ncols=True,
    )
    for episode in bar:
        if episode > 0:
            obs, _ = env.reset()
        epsilon = epsilon_at(episode / config.episodes, config)
        episode_return = 0.0
        losses: list[float] = []
        q_means: list[float] = []
        done = False
        while not done:
            if env_steps < config.learning_starts or rng.random() < epsilon:
                action = int(rng.integers(n_actions))
            else:
                action = online.greedy(obs)
            next_obs, reward, terminated, truncated, _ = env.step(action)
            episode_return += float(reward)
            no_value_after = terminated or (truncated and not config.bootstrap_on_truncation)
            buffer.add(obs, action, float(reward), next_obs, no_value_after)
            env_steps += 1
            obs = next_obs
            done = terminated or truncated

            if env_steps < config.learning_starts:
                continue
            if not normalised:
                # Freeze the input standardisation on the warm-up data (random actions).
                online.obs_mean, online.obs_std = normalisation_from(buffer.obs[: buffer.size])
                target = online.copy()
                normalised = True
            if env_steps % config.train_every == 0:
                loss, q_mean = update(
                    online, target, adam, buffer.sample(rng, config.batch_size), config
                )
                losses.append(loss)
                q_means.append(q_mean)
                updates += 1
                if updates % config.target_update_every == 0:
                    target = online.copy()

        eval_return = float("nan")
        last = episode == config.episodes - 1
        if (
            eval_fn is not None
            and config.eval_every_episodes > 0
            and normalised
            and ((episode + 1) % config.eval_every_episodes == 0 or last)
        ):
            eval_return = float(eval_fn(online))
            if best_eval is None or eval_return > best_eval:
                best_eval, best_episode, best = eval_return, episode, online.copy()

        recent.append(episode_return)
        recent = recent[-100:]
        curve.append(
            {
                "episode": float(episode),
                "env_steps": float(env_steps),
                "episode_return": episode_return,
                "epsilon": epsilon,
                "loss": float(np.mean(losses)) if losses else float("nan"),
                "q_mean": float(np.mean(q_means)) if q_means else float("nan"),
                "eval_return": eval_return,
            }
        )
        if progress:
            postfix = {"return100": f"{np.mean(recent):.3f}", "eps": f"{epsilon:.2f}"}
            if best_eval is not None:
                postfix["best_eval"] = f"{best_eval:.3f}"
            bar.set_postfix(postfix, refresh=False)
    bar.close()

    if not normalised and buffer.size:
        # Fewer steps than learning_starts: still ship a consistent (untrained) normalisation.
        online.obs_mean, online.obs_std = normalisation_from(buffer.obs[: buffer.size])
    network = best if best is not None else online
    return TrainResult(
        network=network,
        config=config,
        curve=curve,
        env_steps=env_steps,
        updates=updates,
        seconds=time.perf_counter() - started,
        best_eval_return=best_eval,
        best_eval_episode=best_episode,
    )


def write_curve_csv(curve: list[dict[str, float]], path: str | Path) -> Path:
    """Write the learning curve (one row per episode) as CSV."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    columns = list(curve[0]) if curve else ["episode", "episode_return"]
    with open(path, "w", newline="") as fh:
        writer = csv.DictWriter(fh, fieldnames=columns)
        writer.writeheader()
        for row in curve:
            writer.writerow(
                {
                    k: (int(v) if k in ("episode", "env_steps") else f"{v:.6g}")
                    for k, v in row.items()
                }
            )
    return path


def read_curve_csv(path: str | Path) -> list[dict[str, float]]:
    with open(path, newline="") as fh:
        return [{k: float(v) for k, v in row.items()} for row in csv.DictReader(fh)]


def save_config(config: Any, path: str | Path) -> Path:
    """Write a (dataclass or dict) config as indented JSON."""
    path = Path(path)
    is_instance = dataclasses.is_dataclass(config) and not isinstance(config, type)
    data = dataclasses.asdict(config) if is_instance else config
    path.write_text(json.dumps(data, indent=2, sort_keys=True) + "\n")
    return path
