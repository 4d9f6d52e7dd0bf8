"""Double DQN trainer: exact check against value iteration, gradient check, helpers."""

from __future__ import annotations

import gymnasium as gym
import numpy as np
import pytest

from dueroute.policies.dqn import (
    DQNConfig,
    QNetwork,
    backward,
    epsilon_at,
    forward,
    init_params,
    read_curve_csv,
    train,
    write_curve_csv,
)

N_STATES, N_ACTIONS, GAMMA, P_END = 5, 3, 0.9, 0.2


def tiny_mdp(seed: int = 1) -> tuple[np.ndarray, np.ndarray]:
    """Random MDP: rewards R[s, a] in [0, 1]; P[s, a, s'] with an absorbing end state n."""
    rng = np.random.default_rng(seed)
    reward = rng.uniform(0.0, 1.0, (N_STATES, N_ACTIONS))
    move = rng.dirichlet(np.full(N_STATES, 0.5), (N_STATES, N_ACTIONS)) * (1.0 - P_END)
    trans = np.concatenate([move, np.full((N_STATES, N_ACTIONS, 1), P_END)], axis=2)
    return trans, reward


def value_iteration(trans: np.ndarray, reward: np.ndarray, gamma: float) -> np.ndarray:
    """Optimal Q by value iteration (Bellman 1957): Q = R + gamma * P max_a' Q, to convergence."""
    q = np.zeros_like(reward)
    for _ in range(10_000):
        new = reward + gamma * trans[:, :, :N_STATES] @ q.max(axis=1)
        if np.max(np.abs(new - q)) < 1e-12:
            break
        q = new
    return q


class TinyMDPEnv(gym.Env):
    """The MDP above as a gymnasium env: one-hot observations, random start state."""

    def __init__(self, trans: np.ndarray, reward: np.ndarray, horizon: int = 30) -> None:
        self.trans, self.reward, self.horizon = trans, reward, horizon
        self.observation_space = gym.spaces.Box(0.0, 1.0, (N_STATES,), np.float32)
        self.action_space = gym.spaces.Discrete(N_ACTIONS)
        self.state = 0
        self.t = 0

    def _obs(self) -> np.ndarray:
        obs = np.zeros(N_STATES, dtype=np.float32)
        obs[self.state] = 1.0
        return obs

    def reset(self, *, seed=None, options=None):
        super().reset(seed=seed)
        self.state = int(self.np_random.integers(N_STATES))
        self.t = 0
        return self._obs(), {}

    def step(self, action):
        r = float(self.reward[self.state, action])
        nxt = int(self.np_random.choice(N_STATES + 1, p=self.trans[self.state, action]))
        self.t += 1
        if nxt == N_STATES:
            return self._obs(), r, True, False, {}
        self.state = nxt
        # Truncation is a time limit outside the MDP: the learner must bootstrap through it.
        return self._obs(), r, False, self.t >= self.horizon, {}


def test_double_dqn_matches_value_iteration():
    """Double DQN on a 5-state stochastic MDP against the exact optimal Q from value iteration
    (Bellman 1957): the greedy policy is optimal in every state and each Q(s, a) is within 0.25
    of the exact value (Q ranges over about 1.8..3.0; the slack covers SGD noise with a
    constant step size)."""
    trans, reward = tiny_mdp(seed=1)
    q_exact = value_iteration(trans, reward, GAMMA)
    gaps = np.sort(q_exact, axis=1)[:, -1] - np.sort(q_exact, axis=1)[:, -2]
    assert gaps.min() > 0.25  # the optimal action is unambiguous in this MDP

    config = DQNConfig(
        seed=0,
        episodes=3000,
        hidden_units=32,
        learning_rate=3e-4,
        gamma=GAMMA,
        batch_size=256,
        buffer_size=20_000,
        learning_starts=500,
        target_update_every=100,
        epsilon_end=0.3,
        exploration_fraction=0.3,
        huber_delta=5.0,
        bootstrap_on_truncation=True,
    )
    result = train(config, TinyMDPEnv(trans, reward), progress=False)
    q_learned = result.network.q_values(np.eye(N_STATES, dtype=np.float32))
    np.testing.assert_array_equal(q_learned.argmax(axis=1), q_exact.argmax(axis=1))
    assert np.max(np.abs(q_learned - q_exact)) < 0.25
    assert result.updates > 0 and len(result.curve) == config.episodes


def test_backward_matches_finite_differences():
    """Analytic gradients of the MLP against central finite differences (the textbook
    gradient check, common practice)."""
    rng = np.random.default_rng(0)
    params = init_params(rng, 4, 6, 3)
    x = rng.normal(size=(5, 4))
    upstream = rng.normal(size=(5, 3))

    def loss(p):
        return float(np.sum(forward(p, x)[0] * upstream))

    _, cache = forward(params, x)
    grads = backward(params, cache, upstream)
    eps = 1e-6
    for name, value in params.items():
        numeric = np.zeros_like(value)
        for idx in np.ndindex(value.shape):
            old = value[idx]
            value[idx] = old + eps
            up = loss(params)
            value[idx] = old - eps
            down = loss(params)
            value[idx] = old
            numeric[idx] = (up - down) / (2 * eps)
        np.testing.assert_allclose(grads[name], numeric, rtol=1e-5, atol=1e-7, err_msg=name)


def test_same_seed_same_network():
    trans, reward = tiny_mdp()
    config = DQNConfig(seed=3, episodes=40, hidden_units=8, learning_starts=50, batch_size=16)
    a = train(config, TinyMDPEnv(trans, reward), progress=False)
    b = train(config, TinyMDPEnv(trans, reward), progress=False)
    for k in a.network.params:
        np.testing.assert_array_equal(a.network.params[k], b.network.params[k])
    np.testing.assert_array_equal(a.network.obs_mean, b.network.obs_mean)


def test_epsilon_schedule():
    config = DQNConfig(epsilon_start=1.0, epsilon_end=0.1, exploration_fraction=0.5)
    assert epsilon_at(0.0, config) == 1.0
    assert epsilon_at(0.25, config) == pytest.approx(0.55)
    assert epsilon_at(0.5, config) == pytest.approx(0.1)
    assert epsilon_at(0.9, config) == pytest.approx(0.1)


def test_config_refuses_bad_values():
    with pytest.raises(ValueError, match="gamma must be in"):
        DQNConfig(gamma=1.5)
    with pytest.raises(ValueError, match="episodes must be >= 1"):
        DQNConfig(episodes=0)


def test_curve_csv_round_trip(tmp_path):
    curve = [{"episode": 0.0, "env_steps": 3.0, "episode_return": 0.5, "loss": float("nan")}]
    path = write_curve_csv(curve, tmp_path / "curve.csv")
    back = read_curve_csv(path)
    assert back[0]["episode_return"] == 0.5 and np.isnan(back[0]["loss"])


def test_qnetwork_normalises_inputs():
    rng = np.random.default_rng(0)
    net = QNetwork(init_params(rng, 3, 4, 2), np.array([1.0, 2.0, 3.0]), np.array([2.0, 2.0, 2.0]))
    x = np.array([3.0, 4.0, 5.0])
    expected, _ = forward(net.params, ((x - net.obs_mean) / net.obs_std)[None, :])
    np.testing.assert_allclose(net.q_values(x), expected[0])
