"""Field series of magnetic nanostructures: switching fields, the loop, the coercive field and the
switching-field distribution from a stack of MFM images over applied-field steps (numpy/scipy only)."""

from .branches import Branch, BranchSwitching, branches, switching
from .distribution import LoopFit, NormalFit, fit_intervals, fit_loop, normal_loop, sheppard_sigma, tagawa_sigma
from .elements import ElementMap, find_elements
from .loop import MIN_STEPS, LoopAnalysis, LoopInputError, analyse_loop
from .states import TipSwitch

__all__ = ["Branch", "BranchSwitching", "branches", "switching", "LoopFit", "NormalFit", "fit_intervals",
           "fit_loop", "normal_loop", "sheppard_sigma", "tagawa_sigma", "ElementMap", "find_elements",
           "MIN_STEPS", "LoopAnalysis", "LoopInputError", "analyse_loop", "TipSwitch"]
