"""Find the elements (dots, islands, inclusions) of a field series: from the topography where the elements stand
out of it, else from the magnetic contrast, which every element shows whatever its state.

Both routes threshold a map at Otsu's level (Otsu 1979, IEEE Trans. Syst. Man Cybern. 9, 62: the level that
maximises the variance between the two classes) and label the connected regions of the upper class
(``scipy.ndimage.label``). A map counts as showing elements only when its two classes are well apart: their
means differ by at least ``MIN_SEPARATION`` pooled standard deviations within the classes (a rule of thumb, no
source).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from assistant.analysis.background import remove_plane

MIN_SEPARATION = 4.0
_BINS = 256


@dataclass(frozen=True)
class ElementMap:
    """The elements of a field series, in the pixel frame of its first image.

    Attributes
    ----------
    labels : (rows, cols) int array; 0 is background, element ``i`` (0-based) has label ``i + 1``.
    count : number of elements.
    centroids_px : (count, 2) ``[row, col]`` of each element's centre.
    areas_px : (count,) pixels per element.
    source : "topography" or "magnetic": the map the elements were found in.
    """

    labels: np.ndarray
    count: int
    centroids_px: np.ndarray
    areas_px: np.ndarray
    source: str


def otsu(values: np.ndarray) -> tuple[float, float]:
    """Otsu's threshold of ``values`` and the separation of its two classes.

    Returns
    -------
    threshold : float
        Level between the classes (Otsu 1979, on a 256-bin histogram).
    separation : float
        Difference of the class means over the pooled within-class standard deviation (0 for a constant map).
    """
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    if v.size < 2 or np.ptp(v) == 0:
        return float(v[0]) if v.size else 0.0, 0.0
    counts, edges = np.histogram(v, bins=_BINS)
    centres = 0.5 * (edges[:-1] + edges[1:])
    w0 = np.cumsum(counts)[:-1].astype(float)
    w1 = v.size - w0
    s0 = np.cumsum(counts * centres)[:-1]
    m0 = s0 / np.maximum(w0, 1)
    m1 = (np.sum(counts * centres) - s0) / np.maximum(w1, 1)
    between = w0 * w1 * (m1 - m0) ** 2
    i = int(np.argmax(between))
    threshold = float(edges[i + 1])
    low, high = v[v <= threshold], v[v > threshold]
    if low.size == 0 or high.size == 0:
        return threshold, 0.0
    pooled = np.sqrt((low.var() * low.size + high.var() * high.size) / v.size)
    separation = float((high.mean() - low.mean()) / pooled) if pooled > 0 else float("inf")
    return threshold, separation


def label_upper_class(image: np.ndarray, *, source: str, min_area_px: int = 4) -> ElementMap | None:
    """The connected regions above Otsu's level of ``image`` as elements, or None when the map shows none.

    Regions smaller than ``min_area_px`` or a quarter of the median region are dropped (noise, debris), and so
    are regions cut by the frame's edge to less than half the median (too little of the element is seen).
    """
    threshold, separation = otsu(image)
    if not separation >= MIN_SEPARATION:
        return None
    labels, n = ndimage.label(np.nan_to_num(image, nan=-np.inf) > threshold)
    if n == 0:
        return None
    areas = np.bincount(labels.ravel(), minlength=n + 1)[1:]
    edge = np.zeros(n + 1, bool)
    for border in (labels[0], labels[-1], labels[:, 0], labels[:, -1]):
        edge[border] = True
    edge = edge[1:]
    median = float(np.median(areas[~edge] if (~edge).any() else areas))  # whole elements set the size
    keep = (areas >= max(min_area_px, 0.25 * median)) & ~(edge & (areas < 0.5 * median))
    if not keep.any():
        return None
    relabel = np.zeros(n + 1, dtype=np.int32)
    relabel[1:][keep] = np.arange(1, int(keep.sum()) + 1)
    labels = relabel[labels]
    count = int(keep.sum())
    index = np.arange(1, count + 1)
    centroids = np.array(ndimage.center_of_mass(np.ones_like(labels), labels, index), dtype=float).reshape(-1, 2)
    return ElementMap(labels=labels, count=count, centroids_px=centroids, areas_px=areas[keep].astype(int),
                      source=source)


def find_elements(topography_m: np.ndarray | None, magnitude: np.ndarray, *, min_area_px: int = 4) -> ElementMap | None:
    """Elements from the (plane-removed) topography if it shows them, else from a magnetic magnitude map.

    Parameters
    ----------
    topography_m : (rows, cols) topography of the first image [m], or None.
    magnitude : (rows, cols) mean over the field steps of |phase - image mean| [deg]: large over every element,
        whichever way it points.
    min_area_px : smallest element kept [pixels].

    Returns
    -------
    ElementMap or None
        None when neither map shows separable elements.
    """
    if topography_m is not None:
        found = label_upper_class(remove_plane(topography_m), source="topography", min_area_px=min_area_px)
        if found is not None:
            return found
    finite = np.isfinite(magnitude)
    if not finite.any():
        return None
    smooth = ndimage.gaussian_filter(np.where(finite, magnitude, float(np.mean(magnitude[finite]))), 0.7)
    return label_upper_class(smooth, source="magnetic", min_area_px=min_area_px)
