"""A refused call changes nothing, and sizes or numbers that cannot work are refused up front.

Property tests: generated bad arguments to every mutating method of the core (and of a shared bias of one
walker) raise a gridbias error and leave the state bitwise identical; generated grid and bias parameters,
however absurd, either make a bias that deposits finite values or raise GridError / ParameterError.
"""

import hashlib
import warnings

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import gridbias as gb

SETTINGS = settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])


def make_bias():
    grid = gb.Grid([-1.0, -np.pi], [1.0, np.pi], [30, 32], [False, True])
    bias = gb.GridBias(grid, sigma=[0.2, 0.4], height=1.0, temperature=300.0, bias_factor=6.0)
    for i, c in enumerate([[0.1, 0.2], [-0.3, 1.0], [0.5, -2.0]]):
        bias.deposit(c, time=float(i))
    return bias


def fingerprint(bias) -> str:
    meta, arrays = bias.to_state()
    digest = hashlib.sha256(repr(sorted(meta.items())).encode())
    for name in sorted(arrays):
        digest.update(name.encode() + arrays[name].tobytes())
    digest.update(repr((bias.n_outside, bias.run_id)).encode())
    return digest.hexdigest()


class Odd:
    """An object no argument should be."""


BAD_NUMBERS = st.sampled_from([np.nan, np.inf, -np.inf, "1.0", "x", None, Odd(), 1j, [], {}, b"1"])
BAD_POINTS = st.one_of(
    BAD_NUMBERS,
    st.lists(st.floats(-1, 1), min_size=0, max_size=5).filter(lambda v: len(v) != 2),
    st.tuples(st.floats(-1, 1), BAD_NUMBERS),
    st.lists(st.lists(st.floats(-1, 1), min_size=3, max_size=3), min_size=2, max_size=2),
)
BAD_TIMES = st.sampled_from([np.nan, np.inf, -np.inf, "soon", Odd(), 1j, [1.0], True, b"0"])


@SETTINGS
@given(s=BAD_POINTS)
def test_deposit_with_a_bad_point_changes_nothing(s):
    bias = make_bias()
    before = fingerprint(bias)
    with pytest.raises(gb.GridBiasError):
        bias.deposit(s, time=1.0)
    assert fingerprint(bias) == before


@SETTINGS
@given(time=BAD_TIMES, s=st.tuples(st.floats(-0.9, 0.9), st.floats(-3, 3)))
def test_deposit_with_a_bad_time_changes_nothing(time, s):
    """The issue's example: deposit(s, time="x") used to add the hill to the grid before refusing."""
    bias = make_bias()
    before = fingerprint(bias)
    with pytest.raises(gb.ParameterError, match="time must be"):
        bias.deposit(s, time=time)
    assert fingerprint(bias) == before


@SETTINGS
@given(which=st.sampled_from(["centers", "heights", "times"]), value=BAD_POINTS | BAD_TIMES | st.just([-1.0]))
def test_add_hills_with_a_bad_argument_changes_nothing(which, value):
    bias = make_bias()
    before = fingerprint(bias)
    args = {"centers": [[0.1, 0.1]], "heights": [0.5], "times": [3.0]}
    args[which] = value
    try:
        bias.add_hills(args["centers"], args["heights"], args["times"])
    except gb.GridBiasError:
        assert fingerprint(bias) == before
    else:  # the value happened to be valid (e.g. a 1-element list): then one hill was added
        assert bias.n_hills == 4


@SETTINGS
@given(field=st.sampled_from(["height", "n_hills", "grid", "sigma", "kind"]), value=BAD_NUMBERS | st.just(-5))
def test_load_state_with_a_bad_state_changes_nothing(field, value):
    bias = make_bias()
    meta, arrays = make_bias().to_state()
    meta[field] = value
    before = fingerprint(bias)
    with pytest.raises(gb.CheckpointError):
        bias.load_state(meta, arrays)
    assert fingerprint(bias) == before


def test_shared_bias_of_one_walker_refuses_bad_arguments_unchanged():
    mpi = pytest.importorskip("mpi4py.MPI")
    from gridbias import walkers

    shared = walkers.share(make_bias(), mpi.COMM_SELF, abort_on_error=False)
    before = fingerprint(shared)
    for s, time in [([0.1, "x"], 1.0), ([0.1, 0.2], "soon"), ([np.nan, 0.0], 1.0), ([0.1], 1.0)]:
        with pytest.raises(gb.GridBiasError):
            shared.deposit(s, time=time)
        assert fingerprint(shared) == before
    assert shared.exchanges == 0


# -------------------------------------------------------------------------------------- sizes and numbers
ANY_NUMBER = st.one_of(st.floats(allow_nan=True, allow_infinity=True), st.integers(-10**20, 10**20),
                       st.sampled_from([1e308, -1e308, 5e-324, 1e-300, 2**62, "3", None]))


@SETTINGS
@given(lower=ANY_NUMBER, upper=ANY_NUMBER, bins=ANY_NUMBER, sigma=ANY_NUMBER, height=ANY_NUMBER,
       temperature=ANY_NUMBER, periodic=st.booleans())
def test_absurd_parameters_are_refused_up_front_or_deposit_finite_values(lower, upper, bins, sigma, height,
                                                                        temperature, periodic):
    """The issue's example: Grid(lower=[-1e308], upper=[1e308]) filled the grid with NaN on deposit."""
    try:
        grid = gb.Grid([lower], [upper], [bins], [periodic])
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            bias = gb.GridBias(grid, [sigma], height, temperature)
    except (gb.GridError, gb.ParameterError):
        return
    if grid.size > 200_000:  # valid but large: the table is within the budget; skip the deposit
        return
    centre = 0.5 * grid.lower[0] + 0.5 * grid.upper[0]
    bias.deposit([centre])
    assert np.isfinite(bias.values).all()
    gb.GridBias.from_state(*bias.to_state())  # what it saves, loads


@pytest.mark.parametrize("kwargs, error, match", [
    (dict(lower=[-1e308], upper=[1e308], bins=[10]), gb.GridError, "overflows a float"),
    (dict(lower=[0.0, 0.0, 0.0], upper=[1, 1, 1], bins=[2000, 2000, 2000]), gb.GridError,
     r"bins \[2000, 2000, 2000\] give 8,012,006,001 nodes, whose bias table needs 512,768,384,064 bytes"),
    (dict(lower=[0.0], upper=[1.0], bins=[1e300]), gb.GridError, "bins must be an integer >= 2, got 1e"),
    (dict(lower=[1e15], upper=[1e15 + 1], bins=[10**6]), gb.GridError, "too fine for float64"),
    (dict(lower=["a"], upper=[1.0], bins=[3]), gb.GridError, "lower must be a number"),
])
def test_grids_that_cannot_work_name_the_parameter(kwargs, error, match):
    with pytest.raises(error, match=match):
        gb.Grid(**kwargs)


@pytest.mark.parametrize("kwargs, match", [
    (dict(walls=None), "walls must be a sequence of gridbias.Wall"),
    (dict(sigma=["wide"]), "sigma must be numbers"),
    (dict(height="1.0"), "height must be a number"),
    (dict(temperature=True), "temperature must be a number"),
    (dict(bias_factor=float("inf")), "bias_factor must be finite"),
])
def test_bias_parameters_of_the_wrong_type_name_the_parameter(kwargs, match):
    args = dict(grid=gb.Grid([0.0], [1.0], [50]), sigma=[0.05], height=1.0, temperature=300.0)
    args.update(kwargs)
    with pytest.raises(gb.ParameterError, match=match):
        gb.GridBias(**args)


def test_a_wall_outside_the_grid_is_warned_about():
    with pytest.warns(UserWarning, match="Wall on cv 0 starts at 5, outside the grid"):
        gb.GridBias(gb.Grid([0.0], [1.0], [50]), [0.05], 1.0, 300.0, walls=[gb.Wall(0, 5.0, 10.0, "above")])
