"""Field series of magnetic nanostructures: switching fields, the loop, the coercive field and the
switching-field distribution from a stack of MFM images over applied-field steps (numpy/scipy only)."""

from .branches import Branch, BranchSwitching, branches, switching
from assistant.analysis._lazy import attach

# which module holds each public name; a name loads its module (and that module's scipy) on first use
__getattr__, __dir__ = attach(__name__, {
    "distribution": ("LoopFit", "NormalFit", "fit_intervals", "fit_loop", "normal_loop", "sheppard_sigma",
              "tagawa_sigma"),
    "elements": ("ElementMap", "find_elements"),
    "loop": ("MIN_STEPS", "LoopAnalysis", "LoopInputError", "analyse_loop"),
    "states": ("TipSwitch",),
})

__all__ = ["Branch", "BranchSwitching", "branches", "switching", "LoopFit", "NormalFit", "fit_intervals",
           "fit_loop", "normal_loop", "sheppard_sigma", "tagawa_sigma", "ElementMap", "find_elements",
           "MIN_STEPS", "LoopAnalysis", "LoopInputError", "analyse_loop", "TipSwitch"]
