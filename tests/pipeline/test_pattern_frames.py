"""Each region picks the frames that build its contraction pattern from its own activity."""

import numpy as np

from beatlab.signals.rest import RestTemplate
from beatlab.stages.frame_pass import label_deviation, pattern_weights


def _rest(activity, deviation, rest):
    n = activity.shape[0]
    return RestTemplate(
        template=np.zeros((8, 8), np.float32),
        rest=rest,
        deviation=deviation,
        shifts_px=np.zeros((n, 2)),
        noise_var=np.zeros((8, 8), np.float32),
        n_frames_used=int(rest.sum()),
        template_frames=np.flatnonzero(rest),
        method="rest-frames",
        activity=activity.astype(np.float32),
        info={"block_factor": 2, "rest_deviation_nm": 0.1},
    )


def test_each_label_takes_its_own_most_contracted_frames():
    n = 100
    t = np.arange(n)
    left_beats = (t % 25 < 4).astype(float)  # the left half contracts in frames 0-3, 25-28, ...
    right_beats = ((t + 12) % 20 < 3).astype(float)  # the right half on its own rhythm
    activity = np.full((n, 4, 4), 0.1)
    activity[:, :, :2] += 5.0 * left_beats[:, None, None]
    activity[:, :, 2:] += 2.0 * right_beats[:, None, None]
    labels = np.zeros((8, 8), int)
    labels[:, :4], labels[:, 4:] = 1, 2
    rest = (left_beats == 0) & (right_beats == 0)
    # the whole field's deviation is dominated by the strong left half
    deviation = np.sqrt((activity**2).mean(axis=(1, 2)))
    dev = label_deviation(_rest(activity, deviation, rest), labels)
    np.testing.assert_allclose(dev[:, 0], 0.1 + 5.0 * left_beats, rtol=1e-6)
    np.testing.assert_allclose(dev[:, 1], 0.1 + 2.0 * right_beats, rtol=1e-6)
    frames, weights = pattern_weights(_rest(activity, deviation, rest), labels)
    assert weights.shape == (frames.size, 3)
    left = frames[weights[:, 0] > 0]
    right = frames[weights[:, 1] > 0]
    assert left.size >= 8 and np.all(left_beats[left] == 1)
    assert right.size >= 8 and np.all(right_beats[right] == 1)
    # weights: the height above the label's resting level (5.0 and 2.0 here)
    np.testing.assert_allclose(weights[weights[:, 1] > 0, 1], 2.0, rtol=1e-6)
    # pixels in no label follow the whole field, whose top frames are the left half's beats
    whole = frames[weights[:, 2] > 0]
    assert np.all(left_beats[whole] == 1)


def test_labels_without_pixels_and_without_activity_use_the_whole_field():
    n = 40
    deviation = np.where(np.arange(n) % 10 < 2, 3.0, 0.1)
    rest = deviation < 1
    activity = np.repeat(deviation[:, None, None], 16, axis=1).reshape(n, 4, 4)
    labels = np.zeros((8, 8), int)
    labels[:4] = 1
    _, weights = pattern_weights(_rest(activity, deviation, rest), labels, n_labels=2)
    assert weights.shape[1] == 3
    np.testing.assert_array_equal(weights[:, 1] > 0, weights[:, 2] > 0)
    no_activity = _rest(activity, deviation, rest)
    no_activity = RestTemplate(**{**no_activity.__dict__, "activity": None})
    assert label_deviation(no_activity, labels) is None
    frames2, weights2 = pattern_weights(no_activity, labels)
    np.testing.assert_array_equal(frames2, np.flatnonzero(deviation > 1))
    np.testing.assert_allclose(weights2[:, 0], 2.9)
