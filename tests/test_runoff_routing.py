"""Linear-reservoir routing, discharge units, efficiencies and the gauge file."""

from __future__ import annotations

import math

import numpy as np
import pytest

from firnline.errors import InputError
from firnline.observations import parse_table
from firnline.runoff import (
    DEFAULT_STORAGE_DAYS,
    RESERVOIRS,
    check_discharge,
    kling_gupta,
    linear_reservoir,
    linear_reservoirs,
    mm_per_day_to_m3s,
    nash_sutcliffe,
    route,
    volume_error,
)


def test_one_mm_per_day_over_86_4_km2_is_one_cubic_metre_per_second():
    # common practice (arithmetic): 1e-3 m * 86.4e6 m2 / 86400 s = 1 m3 s-1
    assert mm_per_day_to_m3s(1.0, 86.4e6) == pytest.approx(1.0, rel=1e-15)


def test_constant_release_converges_to_outflow_equal_release():
    # Source: the linear-reservoir equation dS/dt = R - S/k (Baker et al., 1982; Hock and
    # Noetzli, 1997): under constant R the storage tends to k R and the outflow to R.
    k = 3.0
    out, s = linear_reservoir(np.full(200, 7.0), k)
    assert out[-1] == pytest.approx(7.0, rel=1e-12)
    assert s[-1] == pytest.approx(k * 7.0, rel=1e-12)
    assert np.all(np.diff(out) >= -1e-12)          # rises monotonically towards R


def test_a_single_pulse_decays_as_exp_minus_t_over_k():
    # Source: the reservoir equation; after the input stops, S(t) = S0 exp(-t/k), so the
    # outflow of successive days falls by the factor exp(-1/k).
    k = 4.0
    r = np.zeros(30)
    r[0] = 10.0
    out, s = linear_reservoir(r, k)
    assert np.allclose(out[2:] / out[1:-1], math.exp(-1.0 / k), rtol=1e-12)
    assert np.allclose(s[1:] / s[:-1], math.exp(-1.0 / k), rtol=1e-12)
    # end-of-day discharge S/k follows Q_t = Q_(t-1) exp(-dt/k) + R_t (1 - exp(-dt/k))
    q = s / k
    assert q[0] == pytest.approx(10.0 * (1 - math.exp(-1 / k)), rel=1e-12)


def test_routed_volume_equals_released_volume_less_storage_left():
    rng = np.random.default_rng(1)
    rel = rng.gamma(0.5, 4.0, size=(4, 3 * 365))
    k = [DEFAULT_STORAGE_DAYS[n] for n in RESERVOIRS]
    r = route(rel, k, area_m2=12.5e6, storage0_mm=[1.0, 2.0, 0.0, 3.0])
    assert r.outflow_mm.sum() == pytest.approx(rel.sum() + 6.0 - r.storage_mm.sum(), rel=1e-12)
    assert np.allclose(r.discharge_m3s, r.outflow_mm * 1e-3 * 12.5e6 / 86400.0)


def test_zero_storage_constant_passes_the_release_through():
    rel = np.array([1.0, 0.0, 5.0])
    out, s = linear_reservoir(rel, 0.0)
    assert np.array_equal(out, rel) and not s.any()


def test_many_reservoirs_in_one_pass_follow_the_exact_daily_solution_of_each():
    # Source: the exact daily solution of dS/dt = R - S/k with R constant within a day
    # (Baker et al., 1982; Hock and Noetzli, 1997): S_t = S_(t-1) e^(-1/k) + R_t k (1 - e^(-1/k)),
    # written out here day by day for each row, and k = 0 passing the release through.
    rng = np.random.default_rng(3)
    rel = rng.gamma(0.5, 4.0, size=(5, 400))
    k = [0.0, 1.5, 8.0, 25.0, 60.0]
    s0 = [9.0, 0.0, 2.0, 40.0, 100.0]
    out, s = linear_reservoirs(rel, k, s0)
    for i, ki in enumerate(k):
        if ki == 0.0:
            assert np.array_equal(out[i], rel[i]) and not s[i].any()
            continue
        a = math.exp(-1.0 / ki)
        prev = s0[i]
        for t in range(rel.shape[1]):
            now = prev * a + rel[i, t] * ki * (1.0 - a)
            assert s[i, t] == pytest.approx(now, rel=1e-12)
            assert out[i, t] == pytest.approx(rel[i, t] + prev - now, rel=1e-9, abs=1e-12)
            prev = now
        # volume: released + storage at the start = routed + storage at the end
        assert out[i].sum() == pytest.approx(rel[i].sum() + s0[i] - s[i, -1], rel=1e-12)
    # the end storage alone (no storage series kept) is the last day's, and the outflow the same
    out_end, s_end = linear_reservoirs(rel, k, s0, every_day=False)
    assert np.array_equal(out_end, out) and np.array_equal(s_end, s[:, -1])


def test_nse_and_kge_on_hand_made_series():
    """Worked by hand.

    obs = [1, 2, 3, 4], mean 2.5, sum of squared anomalies 5.
    * sim = obs: NSE = 1, KGE = 1 (r = alpha = beta = 1).
    * sim = [2.5] * 4 (the mean): NSE = 1 - 5 / 5 = 0.
    * sim = [2, 3, 4, 5] (obs + 1): NSE = 1 - 4 / 5 = 0.2; r = 1, alpha = 1,
      beta = 3.5 / 2.5 = 1.4, KGE = 1 - 0.4 = 0.6; volume error = 4 / 10 = 0.4.
    * sim = 2 obs: r = 1, alpha = 2, beta = 2, KGE = 1 - sqrt(2) = -0.41421.
    Sources: Nash and Sutcliffe (1970), J. Hydrology 10; Gupta et al. (2009), J. Hydrology 377.
    """
    obs = np.array([1.0, 2.0, 3.0, 4.0])
    assert nash_sutcliffe(obs, obs) == 1.0 and kling_gupta(obs, obs) == pytest.approx(1.0)
    assert nash_sutcliffe(obs, np.full(4, 2.5)) == pytest.approx(0.0, abs=1e-15)
    assert nash_sutcliffe(obs, obs + 1) == pytest.approx(0.2)
    assert kling_gupta(obs, obs + 1) == pytest.approx(0.6)
    assert volume_error(obs, obs + 1) == pytest.approx(0.4)
    assert kling_gupta(obs, 2 * obs) == pytest.approx(1 - math.sqrt(2))
    # gaps (NaN) drop out of both series
    assert nash_sutcliffe(np.r_[obs, np.nan], np.r_[obs, 9.0]) == 1.0


def _table(text):
    return parse_table(text, "discharge.csv")


def test_gauge_file_with_gaps_is_read_onto_consecutive_days():
    q = check_discharge(_table("date,discharge_m3s\n2020-01-01,1.5\n2020-01-02,\n2020-01-04,2\n"))
    assert q.dates.size == 4 and np.isnan(q.discharge_m3s[[1, 2]]).all()
    got = q.on(np.array(["2019-12-31", "2020-01-01", "2020-01-04"], dtype="datetime64[D]"))
    assert np.isnan(got[0]) and got[1] == 1.5 and got[2] == 2.0


@pytest.mark.parametrize("text, culprit", [
    ("day,q\n2020-01-01,1\n", "missing columns"),
    ("date,discharge_m3s\n2020-13-01,1\n", "line 2"),
    ("date,discharge_m3s\n2020-01-01,1\n2020-01-01,2\n", "line 3: the date 2020-01-01 appears twice"),
    ("date,discharge_m3s\n2020-01-02,1\n2020-01-01,2\n", "line 3"),
    ("date,discharge_m3s\n2020-01-01,abc\n", "line 2: discharge_m3s 'abc' is not a number"),
    ("date,discharge_m3s\n2020-01-01,-1\n", "line 2: discharge_m3s -1 is outside"),
    ("date,discharge_m3s\n2020-01-01,inf\n", "line 2"),
    ("date,discharge_m3s\n2020-01-01,\n", "no discharge value"),
])
def test_bad_gauge_files_name_the_line(text, culprit):
    with pytest.raises(InputError, match=culprit.replace("(", r"\(")):
        check_discharge(_table(text))
