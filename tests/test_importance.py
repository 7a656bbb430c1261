"""Importance sampling (dnmr.importance): the Student t proposal against scipy.stats, the adaptive sampler
against a normal posterior known in closed form, the Pareto diagnostic against draws of known shape, and
systematic resampling against its defining property.

References: scipy.stats.multivariate_t (density) and scipy.stats.genpareto (draws of known shape); for a
d-dimensional Student t with nu degrees of freedom, delta^T Sigma^-1 delta / d follows F(d, nu) (a standard
property of the multivariate t, from memory); systematic resampling gives every draw floor(N w) or
ceil(N w) copies (Kitagawa, J. Comput. Graph. Stat. 5, 1 (1996)).
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from dnmr import importance
from dnmr.importance import (FlatProfile, StudentProposal, pareto_shape, posterior_from_draws, sample_by_importance,
                             systematic_resample)
from dnmr.posterior import Quantity

SCALE = np.array([[4.0, 1.2, 0.0], [1.2, 1.0, -0.3], [0.0, -0.3, 0.5]])


def proposal(**changes) -> StudentProposal:
    """Three t coordinates and one uniform one (the last, between 2 and 7)."""
    peaked = np.array([True, True, True, False])
    settings = dict(centre=np.array([1.0, -2.0, 0.5, 0.0]), scale=SCALE, peaked=peaked,
                    low=np.array([-np.inf, -np.inf, -np.inf, 2.0]), high=np.array([np.inf, np.inf, np.inf, 7.0]))
    return StudentProposal(**{**settings, **changes})


def test_proposal_density_is_scipys_multivariate_t_times_the_uniform():
    q = proposal()
    x = q.draw(np.random.default_rng(0), 500)
    reference = stats.multivariate_t(loc=[1.0, -2.0, 0.5], shape=SCALE, df=importance.DEGREES).logpdf(x[:, :3])
    assert np.allclose(q.log_density(x), reference - math.log(5.0), rtol=0, atol=1e-10)
    assert np.all((x[:, 3] >= 2.0) & (x[:, 3] <= 7.0))


def test_proposal_draws_follow_the_t_and_their_centre_follows_the_profile():
    # delta^T Sigma^-1 delta / d of a multivariate t follows F(d, nu); with a flat profile the centre moves
    # linearly in the flat coordinate between grid points (here by 3 x (that coordinate - 2) in the first one)
    profile = FlatProfile(3, np.array([2.0, 7.0]), np.array([[0.0, 0.0, 0.0], [15.0, 0.0, 0.0]]), np.ones(2))
    q = proposal(profiles=(profile,))
    x = q.draw(np.random.default_rng(1), 4000)
    centre = np.array([1.0, -2.0, 0.5]) + np.outer(3.0 * (x[:, 3] - 2.0), [1.0, 0.0, 0.0])
    delta = x[:, :3] - centre
    distance = np.einsum("ij,jk,ik->i", delta, np.linalg.inv(SCALE), delta) / 3.0
    assert stats.kstest(distance, stats.f(3, importance.DEGREES).cdf).pvalue > 1e-3
    reference = stats.multivariate_t(loc=[0.0, 0.0, 0.0], shape=SCALE, df=importance.DEGREES).logpdf(delta)
    assert np.allclose(q.log_density(x), reference - math.log(5.0), rtol=0, atol=1e-10)  # equal heights: uniform


def test_flat_profile_draws_follow_its_density():
    """A profile falling off a plateau: its density integrates to one (trapezoid rule on a fine grid) and its
    draws follow it (Kolmogorov-Smirnov against the integrated density)."""
    grid = np.array([-3.0, -1.0, 0.0, 0.5, 1.0, 9.0])
    profile = FlatProfile(0, grid, np.zeros((grid.size, 1)), np.array([1.0, 1.0, 0.8, 0.2, 0.01, 0.0]))
    fine = np.linspace(-3.0, 9.0, 200001)
    density = np.exp(profile.log_density(fine))
    cumulative = np.concatenate([[0.0], np.cumsum(0.5 * (density[1:] + density[:-1]) * np.diff(fine))])
    assert cumulative[-1] == pytest.approx(1.0, abs=1e-4)
    draws = profile.draw(np.random.default_rng(4), 5000)
    assert stats.kstest(draws, lambda v: np.interp(v, fine, cumulative)).pvalue > 1e-3
    assert np.mean(draws > 1.0) == pytest.approx(importance.DEFENSIVE * 8.0 / 12.0 + (1 - importance.DEFENSIVE)
                                                 * 0.5 * 0.01 * 8.0 / (2.0 + 0.9 + 0.25 + 0.0525 + 0.04), abs=0.02)


def test_evaluating_a_stage_at_once_gives_the_same_draws_and_weights():
    """The draws come from the generator alone, so evaluating each stage's draws in one call (as on an
    executor) gives the same draws and weights as one at a time; progress is reported after each stage."""
    inverse = np.linalg.inv(np.array([[0.04, 0.018], [0.018, 0.0225]]))

    def log_likelihood(x):
        return -0.5 * float(x @ inverse @ x)

    first = StudentProposal(np.array([0.3, -0.2]), np.diag([0.4, 0.3]), np.array([True, True]),
                            np.array([-1.0, -1.0]), np.array([1.0, 1.0]))
    one_by_one = sample_by_importance(log_likelihood, first, 1000, np.random.default_rng(4), 1.2)
    batches, calls = [], []

    def at_once(function, rows):
        batches.append(len(rows))
        return np.array([function(row) for row in rows])

    staged = sample_by_importance(log_likelihood, first, 1000, np.random.default_rng(4), 1.2,
                                  progress=lambda *a: calls.append(a), evaluate=at_once)
    assert np.array_equal(staged[0], one_by_one[0]) and np.array_equal(staged[1], one_by_one[1])
    assert staged[2] == one_by_one[2] and len(calls) == len(batches) and calls[-1] == (1000, 1000)
    assert sum(batches) <= 1000 and max(batches) > 1  # draws outside the box are not evaluated


def test_adaptive_sampler_recovers_a_normal_posterior_from_a_poor_first_proposal():
    """Posterior N(m, C) inside a box it hardly touches; the first proposal is shifted by two standard
    deviations and three times too wide: the sampler adapts, and the weighted mean and covariance match m and
    C within a few Monte Carlo errors."""
    m = np.array([0.5, 3.0])
    C = np.array([[0.04, 0.018], [0.018, 0.0225]])
    inverse = np.linalg.inv(C)

    def log_likelihood(x):
        d = x - m
        return -0.5 * float(d @ inverse @ d)

    first = StudentProposal(m + np.array([0.4, -0.3]), 9.0 * C, np.array([True, True]),
                            np.array([-10.0, -10.0]), np.array([10.0, 10.0]))
    calls = []
    x, log_weights, adapted = sample_by_importance(log_likelihood, first, 4000, np.random.default_rng(3), 1.2,
                                                   progress=lambda *a: calls.append(a))
    assert adapted >= 1 and calls[-1] == (4000, 4000) and len(calls) == 4000
    w = np.exp(log_weights - log_weights.max())
    w /= w.sum()
    effective = 1.0 / np.sum(w * w)
    assert effective > 1500
    mean = w @ x
    covariance = (x - mean).T @ ((x - mean) * w[:, None])
    errors = np.sqrt(np.diag(C) / effective)
    assert np.all(np.abs(mean - m) < 4.0 * errors)
    assert np.allclose(covariance, C, rtol=0, atol=4.0 * math.sqrt(2.0 / effective) * np.sqrt(np.outer(np.diag(C), np.diag(C))))
    assert pareto_shape(w) < 0.5


@pytest.mark.parametrize("shape", [0.0, 0.5, 1.0])
def test_pareto_shape_of_weights_drawn_with_a_known_shape(shape):
    # weights whose tail is a generalised Pareto of shape k (scipy.stats.genpareto; k = 0 is the exponential)
    weights = stats.genpareto(shape).rvs(size=4000, random_state=np.random.default_rng(7))
    assert pareto_shape(weights) == pytest.approx(shape, abs=0.2)


def test_systematic_resampling_gives_each_draw_floor_or_ceil_of_its_share():
    rng = np.random.default_rng(5)
    weights = rng.gamma(0.5, size=300)
    counts = np.bincount(systematic_resample(weights, rng), minlength=300)
    expected = 300 * weights / weights.sum()
    assert counts.sum() == 300 and np.all((counts >= np.floor(expected)) & (counts <= np.ceil(expected)))


def test_equal_weights_make_a_posterior_of_the_draws_themselves():
    draws = np.random.default_rng(2).normal(size=(1000, 2))
    post = posterior_from_draws(draws, np.zeros(1000), [Quantity("a", "a", ""), Quantity("b", "b", "")],
                                proposal="the normal", seed=0, title="t", likelihood="l", shown=("a", "b"))
    s = post.summary("a")
    assert post.importance["effective_samples"] == pytest.approx(1000.0)
    assert sorted(post.column("a")) == pytest.approx(sorted(draws[:, 0]))  # every draw once
    assert s.median == pytest.approx(float(np.median(draws[:, 0])))
    assert s.effective_samples == pytest.approx(1000.0) and math.isnan(s.autocorrelation_steps)
    assert "importance sampling" in post.report() and post.to_dict()["method"] == "importance"
