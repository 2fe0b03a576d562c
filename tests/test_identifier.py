"""Online identifier: a known system in the model class, batch least-squares equivalence,
the validity gate on a hold, restart equivalence, and the replay summary."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
import scipy.signal

from wingwatch.daemon.codec import SensorFrame, decode_message, encode_sensor_frame
from wingwatch.daemon.config import load_config
from wingwatch.daemon.identifier import OnlineIdentifier
from wingwatch.daemon.identify.interpretable import regressor, simulate_states
from wingwatch.daemon.modelfile import ReferenceModel
from wingwatch.daemon.pipeline import Pipeline, Session

# The synthetic plants below are in the model class with alpha itself as the quasi-steady
# regressor: the circulatory-lag prior (on in the shipped configuration, for the rig's article)
# is off here except in the tests marked 'lag' below; the filter's own tests are in
# test_lift_lag.py.
_BASE = load_config()
CFG = dataclasses.replace(_BASE, identify={**_BASE.identify, "lift_lag_chord_m": 0.0})
RATE = 1000.0
# A plant in the model class (invented demo numbers): one 3 Hz mode and one slow real pole.
KQS = np.array([3.6, 10.0])
KRATE = np.array([0.3, 0.8])
KAM = np.array([0.01, 0.03])
W, Z = 2 * np.pi * 3.0, 0.08
AC = np.array([[0.0, 1.0, 0.0], [-W * W, -2 * Z * W, 0.0], [0.0, 0.0, -1.5]])
BC = np.array([[0.0], [1.0], [1.0]])
CX = np.array([[0.0, 0.01, -0.5], [2.0, 0.0, -1.0]])


def plant_d():
    Ad, Bd, *_ = scipy.signal.cont2discrete((AC, BC, CX, np.zeros((2, 1))), 1 / RATE, method="zoh")
    return Ad, Bd


def motion(n, seed=0, hold_from=None, bandwidth=3.0):
    rng = np.random.default_rng(seed)
    # Band-limited to 3 Hz by a 6th-order filter, so that alpha_ddot is band-limited too (the
    # differentiator sees the same signal the plant saw).
    b, a = scipy.signal.butter(6, bandwidth, fs=RATE)
    u = scipy.signal.lfilter(b, a, rng.standard_normal(n))
    alpha = np.radians(4.0) + np.radians(1.0) * u / u.std()
    if hold_from is not None:
        alpha[hold_from:] = alpha[hold_from]
    ad = np.gradient(alpha, 1 / RATE)
    add = np.gradient(ad, 1 / RATE)
    return alpha, ad, add


def outputs(alpha, ad, add, alpha0=np.radians(4.0)):
    Ad, Bd = plant_d()
    X, _ = simulate_states(Ad, Bd[:, 0], ad)
    y = np.outer(alpha - alpha0, KQS) + np.outer(ad, KRATE) + np.outer(add, KAM) + X @ CX.T
    return y + np.array([0.25, 0.7])  # operating-point outputs


def frames(alpha, y, noise=0.0, seed=1):
    """Raw frames through the inverse of the default channel map."""
    rng = np.random.default_rng(seed)
    ch = CFG.channels
    q = 80.0
    S = CFG.outputs.lift.reference_area_m2
    t = CFG.outputs.curvature.thickness_m
    cl = y[:, 0] + noise * rng.standard_normal(len(alpha))
    kap = y[:, 1] + noise * rng.standard_normal(len(alpha))
    si = {"pitch_enc": alpha, "balance_lift": cl * q * S, "q_pitot": np.full(len(alpha), q),
          "strain_root": kap * t / 2, "strain_mid": kap * t / 4}
    raw = np.column_stack([(si[c] - ch[c].offset) / ch[c].gain for c in CFG.streams["rig"].channels])
    for i in range(0, len(alpha), 10):
        f = SensorFrame("rig", i // 10, i / RATE, RATE, CFG.streams["rig"].channels, raw[i:i + 10])
        yield encode_sensor_frame(f)


def run(cfg, msgs, reference=None):
    p = Pipeline(cfg)
    ident = OnlineIdentifier(cfg, reference)
    p.stages.append(ident)
    out = []
    s = Session(p, sink=lambda t, pl: out.append(decode_message(pl)))
    for topic, payload in msgs:
        s.inbound([topic, payload], 0.0)
    return ident, [m for m in out if m["kind"] == "model"]


def with_identify(**kw):
    return dataclasses.replace(CFG, identify={**CFG.identify, **kw})


def test_known_system_coefficients_modes_and_rank_recovered():
    n = 60000
    alpha, ad, add = motion(n, bandwidth=5.0)  # the excitation covers the 3 Hz mode
    y = outputs(alpha, ad, add)
    ident, models = run(CFG, frames(alpha, y, noise=1e-3))
    acc = [m for m in models if m["status"] == "accepted"]
    assert len(acc) >= 10
    last = acc[-5:]  # the last ten seconds of updates, once the estimates have settled
    for j, out in enumerate(("lift", "curvature")):
        qs = np.median([m["coefficients"]["quasi_steady"][out] for m in last])
        # Reference: the plant's own coefficients; within 5 %. The plant is in the model class,
        # but the 20 s window and its decimated transient leave part of the slow pole to the
        # quasi-steady column (measured: -3 to -5 %).
        assert qs == pytest.approx(KQS[j], rel=0.05)
    osc = [[x for x in m["modes"] if 2.0 < x["freq_hz"] < 4.0] for m in last]
    assert all(osc), [m["modes"] for m in last]
    f = np.median([o[0]["freq_hz"] for o in osc])
    z = np.median([o[0]["damping"] for o in osc])
    # Reference: the plant's 3.00 Hz, zeta 0.08 mode; 2 % in frequency, 50 % in damping
    # (damping is the poorly determined modal quantity; measured +5 to +70 %).
    assert f == pytest.approx(3.0, rel=0.02)
    assert z == pytest.approx(Z, rel=0.5)
    # The oscillatory pair and the real pole need three states; noise and band-limited
    # excitation leave the Hankel spectrum without a clean gap, so more states are taken.
    assert all(3 <= m["rank"] <= 10 for m in last)
    assert last[-1]["fit"]["lift"] < 0.05 and last[-1]["fit"]["curvature"] < 0.05


LAG_CFG = dataclasses.replace(_BASE, identify={**_BASE.identify, "lift_lag_chord_m": 0.1,
                                               "lift_lag_density_kg_m3": 998.0,
                                               "lift_lag_scale": 0.6})


def lagged_outputs(alpha, ad, add, alpha0=np.radians(4.0)):
    """A plant whose quasi-steady part follows Wagner's function (scale 0.6) at the flow speed of
    the frames (q = 80 Pa in water: 0.4004 m/s) over the 0.1 m chord, generated independently of
    the identifier's filter: scipy.signal.lsim of the continuous-time lag states (ZOH)."""
    from wingwatch.daemon.identify.lag import WAGNER_RATES, wagner_weights

    lam = WAGNER_RATES * np.sqrt(2 * 80.0 / 998.0) / 0.05
    sys_c = scipy.signal.StateSpace(np.diag(-lam), np.ones((lam.size, 1)),
                                    -0.6 * wagner_weights()[None, :], np.zeros((1, 1)))
    t = np.arange(alpha.size) / RATE
    _, lagpart, _ = scipy.signal.lsim(sys_c, ad, t, interp=False)
    z = alpha - alpha0 + lagpart
    Ad, Bd = plant_d()
    X, _ = simulate_states(Ad, Bd[:, 0], ad)
    y = np.outer(z, KQS) + np.outer(ad, KRATE) + np.outer(add, KAM) + X @ CX.T
    return y + np.array([0.25, 0.7])


def band_motion(n, seed=0):
    """Pitching between 0.3 and 3 Hz: nothing slow enough to show the lag's tail."""
    rng = np.random.default_rng(seed)
    sos = scipy.signal.butter(4, [0.3, 3.0], btype="band", fs=RATE, output="sos")
    u = scipy.signal.sosfilt(sos, rng.standard_normal(n + 5000))[5000:]
    alpha = np.radians(4.0) + np.radians(1.0) * u / u.std()
    ad = np.gradient(alpha, 1 / RATE)
    return alpha, ad, np.gradient(ad, 1 / RATE)


def test_lag_prior_recovers_the_steady_slope_without_slow_excitation():
    # Reference: the plant's own steady slopes KQS. With the prior the quasi-steady columns are
    # the steady slopes (within 3 %); regressing on alpha itself they settle on the slope of the
    # excited band, which the lag's tail puts several per cent lower.
    n = 90000
    alpha, ad, add = band_motion(n, seed=4)
    msgs = list(frames(alpha, lagged_outputs(alpha, ad, add), noise=1e-3))
    got = {}
    for name, cfg in (("lag", LAG_CFG), ("plain", CFG)):
        _, models = run(cfg, msgs)
        acc = [m for m in models if m["status"] == "accepted"]
        assert len(acc) >= 10, name
        got[name] = np.median([[m["coefficients"]["quasi_steady"][o] for o in ("lift", "curvature")]
                               for m in acc[-5:]], axis=0)
        if name == "lag":
            lag = acc[-1]["lift_lag"]
            r = acc[-1]["rank"] + lag["states"]
            assert np.shape(acc[-1]["A"]) == (r, r) and lag["speed_m_s"] == pytest.approx(0.4004, rel=1e-3)
    np.testing.assert_allclose(got["lag"], KQS, rtol=0.03)
    assert np.all(got["plain"] < KQS * 0.97), got


def test_fast_layer_without_forgetting_equals_batch_least_squares():
    # With forgetting and the windup gate off, fixed (A, B) from a reference and no slow
    # updates, the fast layer's estimate must equal numpy.linalg.lstsq on the same regressor
    # (Ljung & Soderstrom: RLS with lam = 1 is recursive least squares).
    n = 8000
    alpha, ad, add = motion(n, seed=3)
    y = outputs(alpha, ad, add)
    Ad, Bd = plant_d()
    ref = ReferenceModel(dt=1 / RATE, A=Ad, B=Bd, C=np.zeros((2, 3)), k_qs=np.zeros(2),
                         k_rate=np.zeros(2), k_am=np.zeros(2), bias=np.zeros(2),
                         sd={k: np.ones(2) for k in ("quasi_steady", "rate", "added_mass", "bias")},
                         operating_point={"alpha_rad": float(np.radians(4.0)), "lift": 0.25,
                                          "curvature": 0.7})
    cfg = with_identify(half_life_s=float("inf"), gate=0.0, slow_period_s=1000.0)
    ident, _ = run(cfg, frames(alpha, y), ref)
    # Rebuild the same regressor offline from the identifier's own conditioning.
    from wingwatch.daemon.identify.differentiate import differentiate

    w, order = ident.settings.diff_window, ident.settings.diff_order
    d, _ = differentiate(alpha, w, order, 1 / RATE)
    ys = np.column_stack([differentiate(y[:, j], w, order, 1 / RATE)[0][:, 0] for j in range(2)])
    X, _ = simulate_states(Ad, Bd[:, 0], d[:, 1])
    phi = regressor(d[:, 0] - np.radians(4.0), d[:, 1], d[:, 2], X)
    dy = ys - np.array([0.25, 0.7])
    keep = np.arange(n) >= w  # the identifier skips the samples while its filters fill
    theta, *_ = np.linalg.lstsq(phi[keep], dy[keep], rcond=None)
    # 1e-8 relative: the tolerance (the RLS carries no prior weight)
    np.testing.assert_allclose(ident.rls.theta, theta, rtol=1e-8, atol=1e-10)


@pytest.mark.parametrize("cfg", [CFG, LAG_CFG], ids=["plain", "lag"])
def test_hold_is_rejected_and_previous_model_stays_in_service(cfg):
    n = 40000
    alpha, ad, add = motion(n, seed=5, hold_from=26000)
    y = outputs(alpha, ad, add)
    ident, models = run(cfg, frames(alpha, y, noise=1e-3))
    before = [m for m in models if m["t"] < 28.5 and m["status"] == "accepted"]
    # slow-update windows that hold no motion at all (the filters' lag and smoothing carry the
    # last of the motion a little past 26 s)
    after = [m for m in models if m["t"] > 29.0]
    assert before and after
    assert all(m["status"] == "rejected" and "excitation" in m["reason"] for m in after)
    assert ident.in_service["model_id"] == max(before, key=lambda m: m["seq"])["model_id"]


@pytest.mark.parametrize("cfg", [CFG, LAG_CFG], ids=["plain", "lag"])
@pytest.mark.parametrize("cut", [1500, 1505], ids=["at-block", "half-block-pending"])
def test_restart_from_state_dict_continues_identically(cfg, cut):
    # cut: frames (of 10 samples) before the restart, 15 s in; at 1505 half an identifier block
    # is pending in the checkpoint (with its dynamic pressure, which the lag prior reads)
    n = 30000
    alpha, ad, add = motion(n, seed=7)
    y = outputs(alpha, ad, add)
    msgs = list(frames(alpha, y, noise=1e-3))
    p1 = Pipeline(cfg)
    a = OnlineIdentifier(cfg)
    p1.stages.append(a)
    out_a = []
    s1 = Session(p1, sink=lambda t, pl: out_a.append(pl))
    for m in msgs[:cut]:
        s1.inbound(list(m), 0.0)
    state = p1.state_dict()
    p2 = Pipeline(cfg)
    b = OnlineIdentifier(cfg)
    p2.stages.append(b)
    p2.load_state_dict(state)
    out_b = []
    s2 = Session(p2, sink=lambda t, pl: out_b.append(pl))
    s2.pub_seq = dict(s1.pub_seq)
    n_before = len(out_a)
    for m in msgs[cut:]:
        s1.inbound(list(m), 0.0)
        s2.inbound(list(m), 0.0)
    assert len(out_a) - n_before == len(out_b) > 3
    assert out_a[n_before:] == out_b  # byte for byte


def test_cold_start_is_flagged():
    n = 3000
    alpha, ad, add = motion(n)
    _, models = run(CFG, frames(alpha, outputs(alpha, ad, add)))
    assert models[0]["status"] == "rejected" and "running cold" in models[0]["reason"]
    assert models[0]["reference"] is None


def _outputs(msgs, ident, state=None, pub_seq=None):
    p = Pipeline(CFG)
    p.stages.append(ident)
    if state is not None:
        p.load_state_dict(state)
    out = []
    s = Session(p, sink=lambda t, pl: out.append(pl))
    if pub_seq is not None:
        s.pub_seq = dict(pub_seq)
    for m in msgs:
        s.inbound(list(m), 0.0)
    return p, s, out


def test_slow_layer_on_a_worker_thread_gives_the_same_bytes():
    # The slow layer's candidate is computed from a snapshot and applied slow_lag_s of samples
    # later; whether the work ran on a worker thread meanwhile must not change any output.
    n = 32000
    alpha, ad, add = motion(n, seed=9)
    msgs = list(frames(alpha, outputs(alpha, ad, add), noise=1e-3))
    _, _, inline = _outputs(msgs, OnlineIdentifier(CFG))
    _, _, threaded = _outputs(msgs, OnlineIdentifier(CFG, background=True))
    models = [decode_message(pl) for pl in inline]
    assert sum(1 for m in models if m.get("kind") == "model" and m["status"] == "accepted") >= 3
    assert inline == threaded  # byte for byte
    # the candidate takes effect slow_lag_s after its snapshot: model times sit at k * 2 s + 0.5 s
    acc = [m["t"] for m in models if m.get("kind") == "model" and m["status"] == "accepted"]
    lag = CFG.identify.get("slow_lag_s", 0.5)
    assert all(abs((t - lag) / 2.0 - round((t - lag) / 2.0)) < 0.06 for t in acc), acc


def test_restart_while_a_candidate_is_in_flight_continues_identically():
    n = 26000
    alpha, ad, add = motion(n, seed=8)
    msgs = list(frames(alpha, outputs(alpha, ad, add), noise=1e-3))
    cut = 2220  # 22.2 s: the first full-window candidate (snapshot at 22 s) waits for its sample count
    p1, s1, out_a = _outputs(msgs[:cut], OnlineIdentifier(CFG, background=True))
    assert p1.stages[0].job is not None  # really in flight at the cut
    state = p1.state_dict()
    seq_at_cut = dict(s1.pub_seq)
    n_before = len(out_a)
    for m in msgs[cut:]:
        s1.inbound(list(m), 0.0)
    _, _, out_b = _outputs(msgs[cut:], OnlineIdentifier(CFG), state=state, pub_seq=seq_at_cut)
    assert len(out_a) - n_before == len(out_b) >= 2  # the in-flight candidate and one more
    assert out_a[n_before:] == out_b  # byte for byte


def test_window_spread_interval_covers_the_mean_of_independent_windows():
    """_WindowSpread on independent Gaussian window estimates with forgetting: the Student-t
    interval on the weighted mean covers the true mean at about its level (the definition of a
    confidence interval; variance of a weighted mean of iid values, sum w^2 / (sum w)^2 times
    the variance, from memory). 2000 replications, 95 % nominal: binomial sd 0.5 %."""
    from wingwatch.daemon.identifier import _WindowSpread

    rng = np.random.default_rng(11)
    lam = 0.5 ** (2.0 / 30.0)
    reps, hits, widths = 2000, 0, []
    for _ in range(reps):
        sp = _WindowSpread(lam)
        assert sp.half_width(0.95) is None  # nothing before five effective windows
        for x in 3.0 + 0.2 * rng.standard_normal((40, 4, 2)):
            sp.add(x)
        half = sp.half_width(0.95)
        m = sp.s1 / sp.w
        hits += int(abs(m[0, 0] - 3.0) <= half[0, 0])
        widths.append(half[0, 0])
    assert 0.93 <= hits / reps <= 0.97
    n_eff = (1 - lam ** 40) ** 2 / (1 - lam) ** 2 / ((1 - lam ** 80) / (1 - lam ** 2))
    assert np.median(widths) == pytest.approx(1.96 * 0.2 / np.sqrt(n_eff), rel=0.1)


def test_window_spread_survives_a_restart_and_skips_non_finite_windows():
    from wingwatch.daemon.identifier import _WindowSpread

    a = _WindowSpread(0.9)
    rng = np.random.default_rng(2)
    for _ in range(12):
        a.add(rng.standard_normal((4, 2)))
    before = a.half_width(0.95).copy()
    a.add(np.full((4, 2), np.nan))  # a window with no estimate changes nothing
    np.testing.assert_array_equal(a.half_width(0.95), before)
    b = _WindowSpread(0.9)
    b.load_state_dict(a.state_dict())
    x = rng.standard_normal((4, 2))
    a.add(x)
    b.add(x)
    np.testing.assert_array_equal(a.half_width(0.95), b.half_width(0.95))


def test_realisation_spread_follows_the_markov_posterior_and_widens_the_intervals(monkeypatch):
    """The columns' spread over posterior draws of the Markov parameters. For small draws the
    columns are a smooth function of the Markov parameters, so their spread is linear in the
    posterior standard deviation (delta method, from memory): scaling the posterior variance
    by 4 doubles it (within 15 %), and a posterior of zero width gives no spread. The
    published half-width is at least 1.96 times it (quadrature with the conditional interval);
    without draws there is no spread and the intervals are narrower."""
    import dataclasses as dc

    calls = []
    orig = OnlineIdentifier._realisation_spread

    def spy(self, est, rank, W, seed):
        calls.append((self, est, rank, W, seed))
        return orig(self, est, rank, W, seed)

    monkeypatch.setattr(OnlineIdentifier, "_realisation_spread", spy)
    n = 30000
    alpha, ad, add = motion(n, seed=9, bandwidth=5.0)
    y = outputs(alpha, ad, add)
    msgs = list(frames(alpha, y, noise=2e-3, seed=4))
    ident, models = run(CFG, msgs)
    assert calls and ident.realisation_sd is not None and np.all(ident.realisation_sd > 0)
    iv = models[-1]["intervals"]["quasi_steady"]["lift"]
    half = (iv[1] - iv[0]) / 2
    assert half >= 1.959 * ident.realisation_sd[0, 0]

    self_, est, rank, W, seed = calls[-1]

    def scaled(k):
        post = [(U, s2 * k, f) for U, s2, f in est.posterior]
        return orig(self_, dc.replace(est, posterior=post), rank, W, seed)

    small, double = scaled(1e-4), scaled(4e-4)
    np.testing.assert_allclose(double / small, 2.0, rtol=0.15)
    assert np.all(scaled(0.0) <= 1e-9 * np.abs(ident.rls.theta[:3]) + 1e-15)

    monkeypatch.setattr(OnlineIdentifier, "_realisation_spread", orig)
    ident0, models0 = run(with_identify(realisation_draws=0), msgs)
    assert ident0.realisation_sd is None
    iv0 = models0[-1]["intervals"]["quasi_steady"]["lift"]
    assert (iv0[1] - iv0[0]) / 2 < half


def _changing_outputs(alpha, ad, add, n_change, w_new, kqs_new, alpha0=np.radians(4.0)):
    """outputs() with the plant's oscillatory mode moved to ``w_new`` rad/s and the
    quasi-steady columns to ``kqs_new`` from sample ``n_change`` on (the state carries over)."""
    Ad, Bd = plant_d()
    ac2 = AC.copy()
    ac2[1, 0] = -w_new * w_new
    ac2[1, 1] = -2 * Z * w_new
    Ad2, Bd2, *_ = scipy.signal.cont2discrete((ac2, BC, CX, np.zeros((2, 1))), 1 / RATE,
                                              method="zoh")
    X1, x = simulate_states(Ad, Bd[:, 0], ad[:n_change])
    X2, _ = simulate_states(Ad2, Bd2[:, 0], ad[n_change:], x)
    X = np.vstack([X1, X2])
    kqs = np.where(np.arange(alpha.size)[:, None] < n_change, KQS, kqs_new)
    y = (alpha - alpha0)[:, None] * kqs + np.outer(ad, KRATE) + np.outer(add, KAM) + X @ CX.T
    return y + np.array([0.25, 0.7])


def test_a_change_in_the_dynamics_restarts_the_window():
    """A 15 % stiffness loss at 30 s: the plant's 3 Hz mode drops to 2.77 Hz and its static
    curvature gain rises by 1 / 0.85 (a softer strip bends more under the same lift; the
    rig's steady curvature rises alike). The fast layer's one-step error jumps
    (identify.change_ratio): the window restarts at the change,
    candidates wait for 3.2 x markov_s = 16 s of the new dynamics, and the first model after
    that carries the new frequency. Without a change no change point is taken."""
    n, n_change = 60000, 30000
    w_new = W * np.sqrt(0.85)
    alpha, ad, add = motion(n, bandwidth=5.0)
    y = _changing_outputs(alpha, ad, add, n_change, w_new, KQS * np.array([1.0, 1 / 0.85]))
    ident, models = run(CFG, frames(alpha, y, noise=1e-3))
    assert ident.changes == 1
    cut = [m for m in models if "change in the dynamics" in m["reason"]]
    assert cut and all(m["status"] == "rejected" for m in cut)
    t_cut = float(cut[0]["reason"].split("at t = ")[1].split(" s")[0])
    assert 29.9 <= t_cut <= 32.0  # the first block of the 2 s period that saw the change
    # (a candidate in flight at the change, from a window before it, may still be accepted)
    after = [m for m in models if m["status"] == "accepted" and m["t"] > t_cut + 2.6]
    assert after
    # nothing accepted from a window that mixes the two plants
    assert after[0]["t"] >= t_cut + 16.0 - 1e-6
    assert after[0]["t"] <= t_cut + 16.0 + 2.6  # the next slow boundary, plus the 0.5 s lag
    osc = [[x["freq_hz"] for x in m["modes"] if 2.0 < x["freq_hz"] < 4.0] for m in after[:3]]
    assert all(osc), [m["modes"] for m in after[:3]]
    f_old, f_new = W / (2 * np.pi), w_new / (2 * np.pi)
    # The first model already on the new side; the median of the first three within 2 % of
    # the plant's new mode (Reference: w_new / 2 pi = 2.766 Hz; 2 % as in the known-system
    # test; measured +2.7 % for the first, -0.4 % for the median).
    assert abs(osc[0][0] - f_new) < abs(osc[0][0] - f_old)
    assert np.median([o[0] for o in osc]) == pytest.approx(f_new, rel=0.02)
    # the same motion with the plant unchanged: no change point
    ident0, _ = run(CFG, frames(alpha, outputs(alpha, ad, add), noise=1e-3))
    assert ident0.changes == 0


def test_change_ratio_must_be_off_or_above_one():
    from wingwatch.daemon.errors import ConfigError
    from wingwatch.daemon.identifier import IdentifySettings

    assert IdentifySettings.from_config(with_identify(change_ratio=0.0)).change_ratio == 0.0
    assert IdentifySettings.from_config(with_identify(change_ratio=2.5)).change_ratio == 2.5
    with pytest.raises(ConfigError, match="change_ratio"):
        IdentifySettings.from_config(with_identify(change_ratio=0.8))
