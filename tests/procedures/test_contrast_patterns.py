"""What a microscopist expects to see in second-pass phase (common practice of the trade, no single source):
in-plane bits show a pair of dark and bright lines at the transitions (the magnetic charges sit there), out-of-plane
bits show contrast over the bits themselves, and an attractive interaction reads dark (negative phase)."""

from __future__ import annotations

import numpy as np

from assistant.procedures.approach import ApproachSettings, approach
from drivers.base import LineSpec, SecondPass
from drivers.registry import open_controller

LIFT_M = 30e-9
PIXELS = 400
LENGTH_M = 4e-6


def scan(scenario: str, y_m: float = 0.0):
    """One line at 30 nm lift; returns the phase and the film's (Mx, Mz) under each pixel."""
    with open_controller("sim://", scenario=scenario, seed=4) as ctl:
        f0 = ctl.probe_hint()["resonance_hz"]  # nominal; close enough to drive near resonance
        ctl.set_drive(f0, 0.2)
        free = ctl.read(["amplitude_v"])["amplitude_v"]
        approach(ctl, ApproachSettings(f0, 0.2, 0.7 * free, free))
        x0 = -LENGTH_M / 2
        data = ctl.scan_line(LineSpec(y_m=y_m, x_start_m=x0, length_m=LENGTH_M, pixels=PIXELS, line_rate_hz=1.0,
                                      passes=(SecondPass(LIFT_M, 0.0),)))
        sample = ctl.stage.sample
        mx, mz = sample.magnetisation_maps()
        x = x0 + (np.arange(PIXELS) + 0.5) * LENGTH_M / PIXELS
        half = 0.5 * sample.n * sample.pixel_m
        col = np.clip(np.round((x + half) / sample.pixel_m - 0.5).astype(int), 0, sample.n - 1)
        row = int(round((y_m + half) / sample.pixel_m - 0.5))
        ctl.make_safe()
    phase = data.passes[0].phase_deg
    return phase - np.median(phase), mx[row, col], mz[row, col]


def test_inplane_bits_show_dark_and_bright_lines_at_the_transitions():
    phase, mx, _ = scan("inplane-bits")
    sign = np.sign(mx)
    transitions = np.flatnonzero(np.diff(sign) != 0)
    assert transitions.size >= 6
    # the strongest phase within 20 nm of each transition, and the phase in the middle of each bit
    windows = [phase[max(t - 2, 0): t + 3] for t in transitions]
    at_transitions = np.array([w[np.argmax(np.abs(w))] for w in windows])
    centres = [(a + b) // 2 for a, b in zip(transitions[:-1], transitions[1:])]
    assert np.mean(np.abs(at_transitions)) > 3 * np.mean(np.abs(phase[centres]))
    # head-to-head and tail-to-tail transitions alternate: dark, bright, dark, ...
    signs = np.sign(at_transitions)
    assert np.mean(signs[1:] != signs[:-1]) > 0.8, signs


def test_out_of_plane_bits_show_contrast_over_the_bits():
    centre, bit_sign = [], []
    px = LENGTH_M / PIXELS
    for y in (0.0, 0.45e-6, -0.45e-6, 0.9e-6):
        phase, _, mz = scan("default", y_m=y)
        sign = np.sign(mz)
        edges = np.flatnonzero(np.diff(sign) != 0)
        # written bits short enough that their own stray field is sensed over them (a wide uniform domain shows
        # contrast only near its edges: its field is small over its middle)
        bits = [(a, b) for a, b in zip(edges[:-1], edges[1:]) if (b - a) * px < 250e-9 and sign[(a + b) // 2] != 0]
        centre += [phase[(a + b) // 2] for a, b in bits]
        bit_sign += [sign[(a + b) // 2] for a, b in bits]
    centre, bit_sign = np.array(centre), np.array(bit_sign)
    assert centre.size >= 6
    # contrast over the bit: a clear level in the middle of every short bit (the thermal-limited phase noise here
    # is about 0.05 deg), whose sign follows the bit's magnetisation, the same way for every bit (in-plane bits,
    # by contrast, are nearly blank in their middles: the test above)
    assert np.min(np.abs(centre)) > 1.0
    relation = np.sign(centre) * bit_sign
    assert abs(relation.mean()) > 0.8, relation


def test_attractive_reads_dark():
    # at 10 nm lift over a bias far from the contact potential the electrostatic force attracts strongly:
    # the image mean must be negative (dark), and more so than at 0 V
    with open_controller("sim://", seed=5) as ctl:
        ctl.set_drive(75e3, 0.2)
        free = ctl.read(["amplitude_v"])["amplitude_v"]
        phase_ref = np.mean([ctl.read(["phase_deg"])["phase_deg"] for _ in range(100)])
        approach(ctl, ApproachSettings(75e3, 0.2, 0.7 * free, free))
        d = ctl.scan_line(LineSpec(y_m=0.0, x_start_m=-1e-6, length_m=2e-6, pixels=64, line_rate_hz=1.0,
                                   passes=(SecondPass(10e-9, 0.35), SecondPass(10e-9, 3.0))))
        ctl.make_safe()
    at_cpd, biased = (np.mean(p.phase_deg) - phase_ref for p in d.passes)
    assert biased < at_cpd - 1.0
    assert biased < 0
