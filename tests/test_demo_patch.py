import numpy as np

from lensrec.demo_patch import patch_footprint, write_patch
from lensrec.io import read_maps


def test_the_invented_patch_is_a_few_percent_of_the_sky_with_hits_falling_to_the_edge(tmp_path):
    mask, hits = patch_footprint(64)
    # an ellipse of 28 x 19 degrees covers pi a b / 4 pi = 4.0% of the sky (small-angle area, common practice)
    assert 0.03 < mask.mean() < 0.05
    assert np.all(hits[mask == 0] == 0) and np.all(hits[mask > 0] > 0)
    inner = hits[mask > 0] > np.quantile(hits[mask > 0], 0.9)
    assert hits[mask > 0][inner].mean() > 4 * hits[mask > 0].min()  # deep center, shallow edge
    apodized, _ = patch_footprint(64, apodization=3.0)
    assert 0 < apodized.mean() < mask.mean() and np.all(apodized[mask == 0] == 0)
    paths = write_patch(tmp_path, nside=16)
    np.testing.assert_array_equal(read_maps(paths["mask"], fields=0, quantity="none"), patch_footprint(16)[0])
