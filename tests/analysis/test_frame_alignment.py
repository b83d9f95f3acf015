"""Frames saved apart from the CV log get the weight of the record of their step, or a clear refusal."""

import numpy as np
import pytest

from gridbias.analysis import FrameWeights, record_index, weights_at_steps, weights_at_times
from gridbias.errors import ParameterError

KT = 2.494
STEPS = np.arange(1, 101) * 500.0  # a log every 500 steps, 100 records


def _weights(n=100):
    return FrameWeights.from_log_weights(np.linspace(-3.0, 3.0, n), KT)


def test_frames_at_a_multiple_of_the_log_interval_take_their_records_weights():
    w = _weights()
    frames = np.arange(1, 51) * 1000  # every second record
    sub = weights_at_steps(w, STEPS, frames)
    np.testing.assert_array_equal(sub.log_weights, w.log_weights[1::2])
    assert sub.kT == KT and sub.method == w.method
    np.testing.assert_array_equal(record_index(STEPS, frames), np.arange(1, 100, 2))


def test_frames_by_time_match_within_the_tolerance():
    w = _weights()
    times = STEPS * 0.002
    frames = (np.arange(1, 51) * 1000 * 0.002).astype(np.float32)  # times as a trajectory file stores them
    sub = weights_at_times(w, times, frames)
    np.testing.assert_array_equal(sub.log_weights, w.log_weights[1::2])


@pytest.mark.parametrize("frames, message", [
    (np.arange(1, 101) * 750, r"between records \(the frame interval is not a multiple of the log interval"),
    (np.arange(1, 121) * 500, r"20 of 120 frames .* after the log's last record \(the frames run past"),
    (np.r_[100, np.arange(1, 10) * 500], r"1 of 10 frames .*first: frame 0 at step 100.* before its first"),
])
def test_frames_without_a_record_are_refused_saying_why(frames, message):
    with pytest.raises(ParameterError, match=message):
        weights_at_steps(_weights(), STEPS, frames)


def test_bad_input_is_refused():
    with pytest.raises(ParameterError, match="weights has 100 entries but the log has 99 records"):
        weights_at_steps(_weights(), STEPS[:-1], [500])
    with pytest.raises(ParameterError, match="frame_steps must hold whole step numbers, got 500.5"):
        weights_at_steps(_weights(), STEPS, [500.5])
    with pytest.raises(ParameterError, match="frame_steps must be finite, got nan"):
        weights_at_steps(_weights(), STEPS, [np.nan])
    with pytest.raises(ParameterError, match="two records at step 1000"):
        weights_at_steps(_weights(), np.r_[STEPS[:-1], 1000.0], [500])
    with pytest.raises(ParameterError, match="tolerance .* must be below half the smallest interval"):
        weights_at_times(_weights(), STEPS * 0.002, [1.0], tolerance=0.6)
