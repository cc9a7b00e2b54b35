"""Tests of pipeline.lot: the common band grid, the shared network, the tolerance Monte Carlo.

The lots are invented: a 915 MHz ISM-band PCB antenna modelled as a series R-L-C
(resonance, radiation resistance and Q spread from unit to unit) behind a shunt pad
capacitance, built here with a fixed seed. Independent checks: the yield recomputed from
scratch with pipeline.match.predicted_gamma, a brute-force grid with the element-by-element
prediction, an exhaustive quadrature of the tolerance square, scikit-rf cascades, and
published Wilson intervals.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
import skrf
from skrf.media import DefinedGammaZ0

from pipeline import metrics
from pipeline.elements import Element
from pipeline.errors import MatchError
from pipeline.lot import (LotData, common_band_grid, draw_deviations, passes, shared_network,
                          tolerance_yield, yield_at_spec)
from pipeline.match import band_points, match_band, predicted_gamma, worst_return_loss
from pipeline.networks import TOPOLOGIES, Topology, reflection
from pipeline.parts import load_parts, nearest_standard, standard_values
from pipeline.sweep import Provenance, Sweep

BAND = (902e6, 928e6)
SPEC = 12.0                      # dB: cuts through the invented lot (yield ~0.8-0.9)
Z0 = 50.0


def antenna_z(freq_hz, fs_hz, r_ohm, q, c_pad_f=0.6e-12):
    """Series R-L-C tuned to fs_hz with quality factor q, a shunt pad capacitance in front."""
    w, ws = 2 * np.pi * np.asarray(freq_hz), 2 * np.pi * fs_hz
    inductance = q * r_ohm / ws
    z = r_ohm + 1j * w * inductance + 1 / (1j * w / (ws ** 2 * inductance))
    return 1 / (1 / z + 1j * w * c_pad_f)


def invented_sweeps(n_units, seed, freq_hz, spread=1.0):
    """(unit_id, freq_hz, s11) of a lot with unit-to-unit spread (fixed seed)."""
    rng = np.random.default_rng(seed)
    fs = 935e6 * (1 + spread * rng.normal(0, 0.010, n_units))
    r = 18.0 * (1 + spread * rng.normal(0, 0.08, n_units))
    q = 10.0 * (1 + spread * rng.normal(0, 0.05, n_units))
    return [(f"TH-{i + 1:03d}", freq_hz, reflection(antenna_z(freq_hz, a, b, c), Z0))
            for i, (a, b, c) in enumerate(zip(fs, r, q))]


SWEEP_FREQ = np.linspace(850e6, 980e6, 131)          # 1 MHz steps, as an analyzer would


@pytest.fixture(scope="module")
def lot():
    return common_band_grid(invented_sweeps(40, seed=7, freq_hz=SWEEP_FREQ), BAND, z0=Z0)


@pytest.fixture(scope="module")
def finite_q():
    return load_parts("generic-0402")


@pytest.fixture(scope="module")
def shared_ideal(lot):
    return shared_network(lot, SPEC, optima_units=8)


@pytest.fixture(scope="module")
def shared_lossy(lot, finite_q):
    return shared_network(lot, SPEC, parts=finite_q, optima_units=8)


def worst_from_scratch(elements, lot):
    """Each unit's worst in-band RL, one unit at a time through predicted_gamma."""
    return np.array([np.min(metrics.return_loss_db(predicted_gamma(elements, lot.freq_hz, z, lot.z0)))
                     for z in lot.z_load])


# ---------------------------------------------------------------------------------------
# The common grid

def test_same_sweeps_keep_the_single_unit_band_points(lot):
    f_b, z_b = band_points(SWEEP_FREQ, antenna_z(SWEEP_FREQ, 935e6, 18, 10), BAND, Z0)
    assert np.array_equal(lot.freq_hz, f_b)               # 902..928 measured plus the edges
    first = invented_sweeps(40, seed=7, freq_hz=SWEEP_FREQ)[0][2]
    z_first = Z0 * (1 + first) / (1 - first)
    measured = np.isin(lot.freq_hz, SWEEP_FREQ)
    np.testing.assert_allclose(lot.z_load[0, measured], z_first[np.isin(SWEEP_FREQ, lot.freq_hz)],
                               rtol=1e-12)


def test_different_sweeps_are_interpolated_onto_one_grid():
    fine = np.linspace(880e6, 950e6, 1401)                # 50 kHz steps
    coarse = np.linspace(895e6, 935e6, 81)                # 500 kHz steps
    units = [("A", fine, reflection(antenna_z(fine, 930e6, 20, 9), Z0)),
             Sweep(coarse, reflection(antenna_z(coarse, 940e6, 17, 11), Z0),
                   provenance=Provenance(dut_id="B"))]
    data = common_band_grid(units, BAND, points=101, z0=Z0)
    assert data.unit_ids == ("A", "B")
    np.testing.assert_array_equal(data.freq_hz, np.linspace(*BAND, 101))
    # Linear interpolation of a smooth S11 over 50 kHz / 500 kHz steps: small error only.
    for row, (fs, r, q), tol in ((0, (930e6, 20, 9), 1e-5), (1, (940e6, 17, 11), 1e-3)):
        exact = reflection(antenna_z(data.freq_hz, fs, r, q), Z0)
        assert np.max(np.abs(reflection(data.z_load[row], Z0) - exact)) < tol


def test_a_unit_whose_sweep_misses_the_band_is_named():
    short = np.linspace(850e6, 910e6, 61)
    units = invented_sweeps(2, 1, SWEEP_FREQ) + [("TH-short", short, np.zeros(61))]
    with pytest.raises(MatchError, match="TH-short.*not inside the sweep"):
        common_band_grid(units, BAND)


def test_bad_lot_data_is_refused():
    f = np.linspace(*BAND, 5)
    with pytest.raises(MatchError, match="appears more than once"):
        LotData(("a", "a"), f, np.full((2, 5), 30 + 0j))
    with pytest.raises(MatchError, match="'b'.*not positive"):
        LotData(("a", "b"), f, np.array([np.full(5, 30 + 0j), np.full(5, -1 + 0j)]))
    with pytest.raises(MatchError, match="no units"):
        common_band_grid([], BAND)


# ---------------------------------------------------------------------------------------
# Yield

def test_yield_counts_a_unit_exactly_at_spec_as_passing():
    worst = np.array([9.999999, 10.0, 12.0, 3.0, 10.000001])
    assert passes(worst, 10.0).tolist() == [False, True, True, False, True]
    assert yield_at_spec(worst, 10.0) == 3 / 5


@pytest.mark.parametrize("which", ["shared_ideal", "shared_lossy"])
def test_reported_yield_equals_yield_recomputed_from_scratch(which, lot, request):
    result = request.getfixturevalue(which)
    assert 0 < result.yield_fraction < 1                  # a lot that is not trivial
    worst = worst_from_scratch(result.elements, lot)
    np.testing.assert_allclose(result.worst_rl_db, worst, rtol=0, atol=1e-9)
    assert yield_at_spec(worst, SPEC) == result.yield_fraction
    assert yield_at_spec(result.worst_rl_db, SPEC) == result.yield_fraction
    assert result.n_pass == np.count_nonzero(worst >= SPEC)
    assert result.failing_unit_ids == tuple(u for u, w in zip(lot.unit_ids, worst) if w < SPEC)
    assert result.median_worst_rl_db == pytest.approx(np.median(worst), abs=1e-9)


def test_finite_q_elements_carry_their_models(shared_lossy, finite_q):
    for e in shared_lossy.elements:
        assert e.model == finite_q.model_for(e.kind, e.value)
        assert not e.model.is_ideal


def test_values_are_standard_and_in_range(shared_lossy, finite_q):
    for e in shared_lossy.elements:
        assert nearest_standard(e.value, "E24") == e.value
        lo, hi = finite_q.ranges[e.kind]
        assert lo <= e.value <= hi


@pytest.mark.parametrize("series", ["E24", "ideal"])
def test_identical_units_share_the_single_unit_optimum(series):
    f = np.linspace(*BAND, 27)
    z = antenna_z(f, 935e6, 18.0, 10.0)
    data = LotData(tuple(f"same-{i}" for i in range(6)), f, np.tile(z, (6, 1)), Z0)
    single = match_band(f, z, BAND, Z0, series=series)[0]
    assert len(single.elements) == 2
    for spec, expected_yield in ((single.return_loss_db - 0.5, 1.0), (single.return_loss_db + 0.5, 0.0)):
        result = shared_network(data, spec, series=series, optima_units=2)
        assert result.yield_fraction == expected_yield
        assert result.median_worst_rl_db == pytest.approx(single.return_loss_db, abs=1e-6)
        if series == "E24":
            assert result.elements == single.elements
        else:                       # the continuous optimum, to the optimiser's precision
            for got, want in zip(result.elements, single.elements):
                assert (got.position, got.kind) == (want.position, want.kind)
                assert got.value == pytest.approx(want.value, rel=1e-3)


def test_no_network_on_a_wide_brute_force_grid_beats_the_shared_network():
    """Brute force over EVERY E24 pair (1-100 nH, 0.3-100 pF) of all eight topologies, each
    scored on every unit and frequency: none passes more units, or as many with a larger
    median worst RL, than the network found near the per-unit optima."""
    tiny = common_band_grid(invented_sweeps(10, seed=3, freq_hz=np.linspace(890e6, 940e6, 51)),
                            BAND, points=14)
    result = shared_network(tiny, SPEC)
    values = {"inductor": standard_values("E24", 1e-9, 100e-9),
              "capacitor": standard_values("E24", 0.3e-12, 100e-12)}
    for topology in TOPOLOGIES:
        v1 = values[topology.kinds[0]][:, None]
        v2 = values[topology.kinds[1]][None, :]
        worst = worst_return_loss(topology, v1, v2, tiny.freq_hz, tiny.z_load[:, None, None, :],
                                  Z0, None)                     # (units, K1, K2)
        n_pass = np.count_nonzero(worst >= SPEC, axis=0)
        assert n_pass.max() <= result.n_pass, topology.name
        ties = n_pass == result.n_pass
        if ties.any():
            assert np.median(worst, axis=0)[ties].max() <= result.median_worst_rl_db + 1e-9


def test_per_topology_table_is_sorted_and_headed_by_the_winner(shared_ideal):
    rows = shared_ideal.per_topology
    assert rows[0].topology == shared_ideal.topology and rows[0].elements == shared_ideal.elements
    keys = [(r.n_pass, r.median_worst_rl_db) for r in rows]
    assert keys == sorted(keys, reverse=True)
    assert {r.topology for r in rows} <= {t.name for t in TOPOLOGIES}


def test_supplied_per_unit_solutions_give_the_candidates(lot):
    solutions = [match_band(lot.freq_hz, z, lot.band_hz, Z0, series="ideal") for z in lot.z_load[:4]]
    result = shared_network(lot, SPEC, per_unit_solutions=solutions)
    assert yield_at_spec(worst_from_scratch(result.elements, lot), SPEC) == result.yield_fraction


def test_shared_result_as_dict_is_json(shared_lossy):
    d = json.loads(json.dumps(shared_lossy.as_dict()))
    assert d["n_units"] == 40 and len(d["worst_rl_db"]) == 40 and len(d["unit_ids"]) == 40
    assert d["yield_fraction"] == shared_lossy.yield_fraction
    assert {"q", "q_ref_hz", "srf_hz"} <= set(d["elements"][0]) | set(d["elements"][1])


# ---------------------------------------------------------------------------------------
# Independent cascade: scikit-rf

def skrf_worst_rl(elements, freq_hz, z_load, lossy):
    """Worst RL of the network in front of z_load, cascaded with scikit-rf 2-ports."""
    media = DefinedGammaZ0(frequency=skrf.Frequency.from_f(freq_hz, unit="Hz"), z0=Z0)
    chain = None
    for e in elements:
        if lossy:      # the part's own impedance as a series or shunt 2-port
            series = media.resistor(e.impedance(freq_hz))
            two_port = series if e.position == "series" else media.shunt(series ** media.short(nports=1))
        else:
            name = ("" if e.position == "series" else "shunt_") + e.kind
            two_port = getattr(media, name)(e.value)
        chain = two_port if chain is None else chain ** two_port
    load = skrf.Network(frequency=media.frequency, s=reflection(z_load, Z0).reshape(-1, 1, 1), z0=Z0)
    return float(np.min(metrics.return_loss_db((chain ** load).s[:, 0, 0])))


@pytest.mark.parametrize("which, lossy", [("shared_ideal", False), ("shared_lossy", True)])
def test_scikit_rf_cascade_agrees_within_0_01_db(which, lossy, lot, request):
    result = request.getfixturevalue(which)
    for u in (0, 13, 27, 39):
        rl = skrf_worst_rl(result.elements, lot.freq_hz, lot.z_load[u], lossy)
        assert abs(rl - result.worst_rl_db[u]) < 0.01


# ---------------------------------------------------------------------------------------
# Tolerance Monte Carlo

def test_monte_carlo_is_reproducible_with_its_seed(lot, shared_lossy, finite_q):
    a = tolerance_yield(lot, shared_lossy.elements, SPEC, finite_q, n_trials=400, seed=11)
    b = tolerance_yield(lot, shared_lossy.elements, SPEC, finite_q, n_trials=400, seed=11)
    c = tolerance_yield(lot, shared_lossy.elements, SPEC, finite_q, n_trials=400, seed=12)
    assert a.as_dict() == b.as_dict() and a.seed == 11
    np.testing.assert_array_equal(a.trial_worst_rl_db, b.trial_worst_rl_db)
    assert not np.array_equal(a.trial_worst_rl_db, c.trial_worst_rl_db)
    assert a.yield_fraction == yield_at_spec(a.trial_worst_rl_db, SPEC)
    assert a.ci_low <= a.yield_fraction <= a.ci_high
    json.dumps(a.as_dict())


def test_tolerances_come_from_the_parts_file(shared_lossy, finite_q, lot):
    result = tolerance_yield(lot, shared_lossy.elements, SPEC, finite_q, n_trials=10)
    for e, tol in zip(shared_lossy.elements, result.tolerance):
        # generic-0402.toml: +-5 %, but +-0.3 nH below 6 nH and +-0.1 pF below 10 pF
        small = {"inductor": (6e-9, 0.3e-9), "capacitor": (10e-12, 0.1e-12)}[e.kind]
        expected = small[1] if e.value < small[0] else 0.05 * e.value
        assert tol == pytest.approx(expected, rel=1e-12)


def test_ci_contains_the_exact_yield_from_exhaustive_quadrature(finite_q):
    """Two units, uniform part values: the exact yield is the passing area of the tolerance
    square, averaged over the units (a 300 x 300 midpoint grid, scored with match.py's
    vectorised scorer, a code path the Monte Carlo does not use)."""
    f = np.linspace(*BAND, 21)
    z = np.array([antenna_z(f, 933e6, 17.0, 10.0), antenna_z(f, 938e6, 19.5, 10.5)])
    data = LotData(("u1", "u2"), f, z, Z0)
    topology = Topology(("shunt", "series"), ("inductor", "capacitor"))
    v1, v2 = 6.8e-9, 12e-12
    elements = tuple(Element(p, k, v, finite_q.model_for(k, v))
                     for p, k, v in zip(topology.positions, topology.kinds, (v1, v2)))
    tol1, tol2 = 0.05 * v1, 0.05 * v2
    d = (np.arange(300) + 0.5) / 300 * 2 - 1
    exact = np.mean([np.mean(worst_return_loss(topology, (v1 + d * tol1)[:, None], (v2 + d * tol2)[None, :],
                                               f, zu, Z0, finite_q) >= 11.5) for zu in z])
    assert 0.2 < exact < 0.8                              # the spec cuts through the square
    result = tolerance_yield(data, elements, 11.5, finite_q, n_trials=2000, seed=5)
    assert result.ci_low <= exact <= result.ci_high
    assert result.ci_high - result.ci_low < 0.05


def test_each_trial_is_the_library_model_at_its_drawn_values(lot, shared_lossy, finite_q):
    """A drawn part keeps the library's parasitics (cp_f, esl_h) and Q/ESR: every trial equals
    match.py's scorer with the library models at the drawn values, unit by unit."""
    result = tolerance_yield(lot, shared_lossy.elements, SPEC, finite_q, n_trials=50, seed=4)
    topology = Topology(tuple(e.position for e in shared_lossy.elements),
                        tuple(e.kind for e in shared_lossy.elements))
    nominal = np.array([e.value for e in shared_lossy.elements])
    assert np.all(np.abs(result.trial_values - nominal) <= np.array(result.tolerance) * (1 + 1e-12))
    for unit, values, worst in zip(result.trial_unit_index, result.trial_values, result.trial_worst_rl_db):
        expected = worst_return_loss(topology, values[0], values[1], lot.freq_hz, lot.z_load[unit],
                                     Z0, finite_q)
        assert worst == pytest.approx(float(expected), abs=1e-9)


def zero_tolerance_parts(tmp_path):
    path = tmp_path / "exact-parts.toml"
    path.write_text('description = "parts exactly on value (test)"\n'
                    "[inductor]\nmin = 0.5e-9\nmax = 1e-6\ntolerance = 0.0\n"
                    "[capacitor]\nmin = 0.1e-12\nmax = 1e-9\ntolerance = 0.0\n")
    return load_parts(path)


def test_zero_tolerance_trials_are_the_drawn_units_nominal_results(tmp_path, lot, shared_ideal):
    parts = zero_tolerance_parts(tmp_path)
    result = tolerance_yield(lot, shared_ideal.elements, SPEC, parts, n_trials=3000, seed=2)
    np.testing.assert_allclose(result.trial_worst_rl_db, shared_ideal.worst_rl_db[result.trial_unit_index],
                               rtol=0, atol=1e-9)
    assert result.ci_low <= shared_ideal.yield_fraction <= result.ci_high
    assert set(np.unique(result.trial_unit_index)) == set(range(lot.n_units))   # a bootstrap


def test_wilson_interval_matches_newcombe_1998(tmp_path):
    """20 of 20 trials passing: Wilson 95 % interval 0.8389-1 (the mirror of 0/20 -> 0-0.1611,
    R. G. Newcombe, Stat. Med. 17:857-872, 1998, Table I; from memory). Clopper-Pearson
    would give 0.8316, the Wald interval 1-1."""
    f = np.linspace(*BAND, 9)
    data = LotData(("ok",), f, np.full((1, 9), Z0 + 0j), Z0)
    parts = zero_tolerance_parts(tmp_path)
    result = tolerance_yield(data, (), SPEC, parts, n_trials=20, seed=0)
    assert result.n_pass == 20 and result.yield_fraction == 1.0
    assert result.ci_low == pytest.approx(0.8389, abs=5e-5) and result.ci_high == pytest.approx(1.0)


@pytest.mark.parametrize("distribution", ["uniform", "normal-3sigma"])
def test_deviation_draws_stay_within_tolerance(distribution):
    d = draw_deviations(np.random.default_rng(0), distribution, 200_000)
    assert d.min() >= -1 and d.max() <= 1
    # uniform on [-1, 1]: sd 1/sqrt(3); normal, sigma 1/3, cut at 3 sigma: sd 0.98658/3
    # (truncated-normal variance 1 - 2*3*phi(3)/(2*Phi(3) - 1), common statistics texts).
    expected = 1 / np.sqrt(3) if distribution == "uniform" else 0.98658 / 3
    assert d.std() == pytest.approx(expected, rel=0.01)
    assert abs(d.mean()) < 0.01


def test_normal_distribution_yields_more_than_uniform_when_the_edges_fail(finite_q):
    """Concentrating the values near nominal can only help a network that passes at nominal
    and fails at the tolerance corners."""
    f = np.linspace(*BAND, 21)
    data = LotData(("u1",), f, antenna_z(f, 935e6, 18.0, 10.0)[None, :], Z0)
    elements = tuple(Element(p, k, v, finite_q.model_for(k, v)) for p, k, v in
                     (("shunt", "inductor", 6.8e-9), ("series", "capacitor", 12e-12)))
    uniform = tolerance_yield(data, elements, 12.0, finite_q, seed=1)
    normal = tolerance_yield(data, elements, 12.0, finite_q, seed=1, distribution="normal-3sigma")
    assert 0.7 < uniform.yield_fraction < 0.9             # nominal 12.37 dB passes, corners fail
    assert normal.yield_fraction > uniform.yield_fraction
    assert normal.distribution == "normal-3sigma"
