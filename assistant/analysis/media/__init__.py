"""Media family: what the contrast says about the magnetisation, and metrics of recorded tracks.

``orientation`` (in-plane / out-of-plane from the phase relation of the image and its Hilbert transform),
``tracks`` (tracks, transitions, bit-cell grid, jitter, transition width, erase bands), with their parts
``local_phase``, ``transfer``, ``transitions``, ``bit_grid`` and ``track_layout``; ``errors``. numpy only (loading
scipy would take a third of ``mfma analyze image``'s time); the noise estimate is the lift-series family's
(``white_noise_std``).
"""

from assistant.analysis._lazy import attach

# which module holds each public name; a name loads its module on first use
__getattr__, __dir__ = attach(__name__, {
    "errors": ("MediaInputError", "TooFewPixelsPerBitError"),
    "orientation": ("Orientation", "magnetisation_orientation"),
    "tracks": ("TrackAnalysis", "TrackResult", "analyse_tracks"),
    "transfer": ("point_probe_transfer",),
})

__all__ = ["Orientation", "magnetisation_orientation", "MediaInputError", "TooFewPixelsPerBitError",
           "TrackAnalysis", "TrackResult", "analyse_tracks", "point_probe_transfer"]
