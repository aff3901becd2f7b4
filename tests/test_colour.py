"""The colour representation: CIELAB against scikit-image's `rgb2lab` on its bundled photographs,
and per-cell statistics that move where a stain sits."""
import numpy as np
import pytest

from oddling.backbones.colour import CELL_PIXELS, colour_features, rgb_to_lab


@pytest.mark.parametrize("name", ["coffee", "astronaut", "chelsea", "immunohistochemistry"])
def test_cielab_equals_scikit_image(name):
    from skimage import data
    from skimage.color import rgb2lab

    image = getattr(data, name)()
    # scikit-image, D65 2 degrees; it rounds the slope of the dark branch of f to 7.787 where the
    # standard's is 1/(3 (6/29)^2) = 7.787037, which moves the darkest pixels by up to 2e-4
    np.testing.assert_allclose(rgb_to_lab(image), rgb2lab(image), atol=2e-4)


def test_cielab_of_known_colours():
    # CIE 1976 values from memory: white (100, 0, 0), black (0, 0, 0), sRGB red about (53.24, 80.09, 67.20)
    lab = rgb_to_lab(np.array([[255, 255, 255], [0, 0, 0], [255, 0, 0]]))
    np.testing.assert_allclose(lab[0], [100, 0, 0], atol=1e-2)
    np.testing.assert_allclose(lab[1], [0, 0, 0], atol=1e-9)
    np.testing.assert_allclose(lab[2], [53.24, 80.09, 67.20], atol=0.05)


def test_features_are_unit_length_and_a_stain_moves_its_own_cells():
    from skimage import data

    grid = 4
    side = grid * CELL_PIXELS
    image = np.asarray(data.coffee()[:side * 4:4, :side * 4:4], dtype=np.float32)   # a 32 px thumbnail
    stained = image.copy()
    stained[:CELL_PIXELS, :CELL_PIXELS] = 0.5 * stained[:CELL_PIXELS, :CELL_PIXELS] + 0.5 * np.array([40, 160, 40])
    f = colour_features(np.stack([image, stained]).transpose(0, 3, 1, 2), grid)
    assert f.shape == (2, 6 * grid * grid)
    np.testing.assert_allclose(np.linalg.norm(f, axis=1), 1.0, rtol=1e-6)
    cells = np.abs(f[0] - f[1]).reshape(grid, grid, 6).sum(axis=2)
    assert cells.argmax() == 0 and cells[0, 0] > 5 * np.sort(cells.ravel())[-2]   # the stained corner cell
