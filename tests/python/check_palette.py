#!/usr/bin/python3
"""Checks that the report palette (PaletteColour in client/report_plot.cc) stays apart for
colour-blind readers.

usage: check_palette.py REPORT_PLOT_CC [--min-delta-e D]

Each colour (sRGB, IEC 61966-2-1 transfer function) is passed through the simulation matrices of
Machado, Oliveira and Fernandes (IEEE TVCG 2009) for protanopia, deuteranopia and tritanopia at
severity 1.0, applied in linear RGB (the matrices are quoted from memory, as published in the
paper's supplementary table), and converted to CIELAB (D65 white; the XYZ matrix of sRGB). Every
pair of the eight colours must differ by at least D (default 12) in CIE 1976 Delta E under normal
vision and under each simulation, and every colour by at least 30 from white (the page). A Delta E
of about 2.3 is a just-noticeable difference (common practice). Exit 0 when all pairs pass, 1
otherwise (each failing pair is printed), 2 when the palette cannot be read.
"""
import argparse
import itertools
import re
import sys

import numpy

SIMULATIONS = {
    "normal vision": numpy.eye(3),
    "protanopia": numpy.array([[0.152286, 1.052583, -0.204868], [0.114503, 0.786281, 0.099216],
                               [-0.003882, -0.048116, 1.051998]]),
    "deuteranopia": numpy.array([[0.367322, 0.860646, -0.227968], [0.280085, 0.672501, 0.047413],
                                 [-0.011820, 0.042940, 0.968881]]),
    "tritanopia": numpy.array([[1.255528, -0.076749, -0.178779], [-0.078411, 0.930809, 0.147602],
                               [0.004733, 0.691367, 0.303900]]),
}
SRGB_TO_XYZ = numpy.array([[0.4124, 0.3576, 0.1805], [0.2126, 0.7152, 0.0722], [0.0193, 0.1192, 0.9505]])
D65 = numpy.array([0.95047, 1.0, 1.08883])


def linear(hex_colour):
    c = numpy.array([int(hex_colour[i:i + 2], 16) / 255 for i in (1, 3, 5)])
    return numpy.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)


def lab(rgb_linear):
    t = SRGB_TO_XYZ @ numpy.clip(rgb_linear, 0, 1) / D65
    f = numpy.where(t > (6 / 29) ** 3, numpy.cbrt(t), t / (3 * (6 / 29) ** 2) + 4 / 29)
    return numpy.array([116 * f[1] - 16, 500 * (f[0] - f[1]), 200 * (f[1] - f[2])])


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("source")
    ap.add_argument("--min-delta-e", type=float, default=12.0)
    args = ap.parse_args()
    text = open(args.source).read()
    m = re.search(r"kPalette = \{([^}]*)\}", text)
    palette = re.findall(r'"(#[0-9a-fA-F]{6})"', m.group(1)) if m else []
    if len(palette) != 8:
        print(f"check_palette: expected 8 colours in kPalette of {args.source}, found {palette}")
        return 2
    white = lab(numpy.ones(3))
    bad = 0
    for name, matrix in SIMULATIONS.items():
        seen = [lab(matrix @ linear(c)) for c in palette]
        pairs = [(float(numpy.linalg.norm(seen[i] - seen[j])), i, j) for i, j in itertools.combinations(range(8), 2)]
        worst = min(pairs)
        print(f"{name}: closest pair {palette[worst[1]]} / {palette[worst[2]]} Delta E {worst[0]:.1f}")
        for d, i, j in pairs:
            if d < args.min_delta_e:
                print(f"FAIL: {name}: {palette[i]} and {palette[j]} differ by Delta E {d:.1f} < {args.min_delta_e}")
                bad += 1
        for c, l in zip(palette, seen):
            if numpy.linalg.norm(l - white) < 30:
                print(f"FAIL: {name}: {c} is too close to white (Delta E {numpy.linalg.norm(l - white):.1f})")
                bad += 1
    print("palette: every pair apart" if bad == 0 else f"palette: {bad} failures")
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main())
