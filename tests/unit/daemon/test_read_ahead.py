"""How far the reader thread reads ahead of the model: frames of up to 32 MiB in all,
four for 16 features, never fewer than two, so memory stays bounded for wide rows."""
import pytest

from shoal.daemon.files.readers import BATCH_ROWS
from shoal.daemon.ingest.stages import READ_AHEAD_BYTES, frames_ahead


@pytest.mark.parametrize("n_features, frames", [(1, 4), (16, 4), (17, 3), (21, 3),
                                                (22, 2), (64, 2), (5000, 2)])
def test_frames_read_ahead_fit_the_budget_and_are_two_to_four(n_features, frames):
    assert frames_ahead(n_features) == frames
    frame_bytes = BATCH_ROWS * n_features * 8
    assert frames * frame_bytes <= READ_AHEAD_BYTES or frames == 2
