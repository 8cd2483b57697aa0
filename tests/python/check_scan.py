#!/usr/bin/python3
"""Checks the picture and the table of a graft scan against its scan.json.

Usage: /usr/bin/python3 check_scan.py SCAN_DIR

SCAN_DIR holds graft's scan.json, scan.tsv and scan.svg. scan.json lists, per variable, the
candidates (layer, kind "block" or "random", units, iia and iia_changed as {value, lo, hi,
correct, n}) and the best one.

scan.svg is read with Python's own XML parser (xml.etree.ElementTree), and must be:
  - an <svg> document in the SVG namespace;
  - one heat map per scanned variable, each opened by a <text> "VAR: IIA on changed cases by
    layer and unit block", in any order;
  - in each heat map, one <rect> cell per block candidate of that variable (random subsets are
    not drawn) and no other: cells on a full grid, one row per scanned layer and one column
    per block, no two cells in one place, every cell in a row naming that row's layer, and
    columns in the order of the blocks' first unit;
  - each cell's <title> "layer L units U: V [LO, HI] n=N" giving its candidate's changed-case
    IIA to three decimals, and its fill no lighter than that of any cell with a lower value,
    and darker when the values differ by more than 0.01 (a monotone colour scale);
  - exactly one cell outlined (a stroke wider than the other cells') when the best candidate is
    a block, and it is that candidate; none when the best is a random subset.
scan.tsv must have a header and one row per candidate of every variable, with the same layer,
kind, units and counts as scan.json.

A transformer's scan.json gives each candidate a "position" (an input's name or readout; units
are then units of that token's residual stream): the picture has one heat map per variable and
position, opened by "VAR at POSITION: IIA on changed cases by layer and unit block", each held to
the rules above over that position's candidates, with the best site outlined only in the heat
map of its own position; scan.tsv then has a position column, checked too.

Prints one line per variable and "checked N heat maps". Exit codes: 0 all hold, 1 any check
fails (each is printed), 2 malformed input.
"""

import json
import os
import re
import sys
import xml.etree.ElementTree as ET

SVG = "{http://www.w3.org/2000/svg}"
PANEL = re.compile(r"^(.+): IIA on changed cases by layer and unit block$")
TITLE = re.compile(r"^layer (\d+) units ([0-9,-]+): (\d\.\d{3}) \[(\d\.\d{3}), (\d\.\d{3})\] n=(\d+)$")


def units_text(units):
    """graft's way of writing a unit list: "a-b" when contiguous, else comma-separated."""
    if len(units) > 1 and all(b == a + 1 for a, b in zip(units, units[1:])):
        return f"{units[0]}-{units[-1]}"
    return ",".join(str(u) for u in units)


def lightness(fill):
    m = re.fullmatch(r"#([0-9a-fA-F]{2})([0-9a-fA-F]{2})([0-9a-fA-F]{2})", fill or "")
    if m is None:
        raise ValueError(f"fill {fill!r} is not #rrggbb")
    return sum(int(g, 16) for g in m.groups())


def panels_of(root, failures):
    """Variable -> list of (rect element, title text) in document order."""
    panels, current = {}, None
    for el in root.iter():
        if el.tag == SVG + "text":
            m = PANEL.match((el.text or "").strip())
            if m:
                current = m.group(1)
                if current in panels:
                    failures.append(f"scan.svg: two heat maps for {current!r}")
                panels[current] = []
        elif el.tag == SVG + "rect" and el.get("width") != "100%":
            if current is None:
                failures.append("scan.svg: a cell before any heat map title")
                continue
            title = el.find(SVG + "title")
            panels[current].append((el, (title.text or "").strip() if title is not None else ""))
    return panels


def panel_entries(variables):
    """Heat map title -> {"candidates", "best"}: one per variable, or per variable and position."""
    panels = {}
    for name, entry in variables.items():
        positions = []
        for c in entry["candidates"]:
            if "position" in c and c["position"] not in positions:
                positions.append(c["position"])
        if not positions:
            panels[name] = entry
            continue
        for p in positions:
            best = entry["best"] if entry["best"].get("position") == p else {"kind": "elsewhere"}
            if best["kind"] == "elsewhere" or not any(c["kind"] == "block" for c in entry["candidates"]
                                                       if c.get("position") == p):
                best = {"kind": "elsewhere"}
            panels[f"{name} at {p}"] = {"candidates": [c for c in entry["candidates"] if c.get("position") == p],
                                        "best": best}
    return panels


def check_variable(name, entry, cells, failures):
    blocks = [c for c in entry["candidates"] if c["kind"] == "block"]
    by_key = {(c["layer"], units_text(c["units"])): c for c in blocks}
    if len(by_key) != len(blocks):
        failures.append(f"{name}: scan.json lists a block twice")
    if len(cells) != len(blocks):
        failures.append(f"{name}: {len(cells)} cells in scan.svg, {len(blocks)} block candidates in scan.json")
    seen, positions, rows, outlined, shades = set(), {}, {}, [], []
    widths = [float(el.get("stroke-width", "0")) for el, _ in cells]
    for (el, title), width in zip(cells, widths):
        m = TITLE.match(title)
        if m is None:
            failures.append(f"{name}: cell title {title!r} is not 'layer L units U: V [LO, HI] n=N'")
            continue
        key = (int(m.group(1)), m.group(2))
        cand = by_key.get(key)
        if cand is None:
            failures.append(f"{name}: cell for layer {key[0]} units {key[1]} is no block candidate of scan.json")
            continue
        if key in seen:
            failures.append(f"{name}: two cells for layer {key[0]} units {key[1]}")
        seen.add(key)
        ch = cand["iia_changed"]
        want = (f"{ch['value']:.3f}", f"{ch['lo']:.3f}", f"{ch['hi']:.3f}", str(ch["n"]))
        if (m.group(3), m.group(4), m.group(5), m.group(6)) != want:
            failures.append(f"{name}: cell {title!r} disagrees with scan.json's {want}")
        xy = (float(el.get("x")), float(el.get("y")))
        if xy in positions:
            failures.append(f"{name}: cells {positions[xy]} and {key} in the same place")
        positions[xy] = key
        rows.setdefault(xy[1], set()).add(key[0])
        shades.append((ch["value"], lightness(el.get("fill")), key))
        if width > min(widths):
            outlined.append(key)
    layers = sorted({c["layer"] for c in blocks})
    columns = len(blocks) // max(1, len(layers))
    xs = sorted({x for x, _ in positions})
    if len(rows) != len(layers) or len(xs) != columns or len(positions) != len(layers) * columns:
        failures.append(f"{name}: cells are not a grid of {len(layers)} layers x {columns} blocks "
                        f"({len(rows)} rows, {len(xs)} columns, {len(positions)} cells)")
    for y, named in rows.items():
        if len(named) != 1:
            failures.append(f"{name}: one row of cells names layers {sorted(named)}")
    for (x, y), key in positions.items():
        first = int(re.split(r"[-,]", key[1])[0])
        for (x2, y2), key2 in positions.items():
            if y2 == y and x2 > x and int(re.split(r"[-,]", key2[1])[0]) <= first:
                failures.append(f"{name}: column order differs from unit order ({key} left of {key2})")
    for v1, l1, k1 in shades:
        for v2, l2, k2 in shades:
            if (v1 > v2 and l1 > l2) or (v1 > v2 + 0.01 and l1 >= l2):
                failures.append(f"{name}: {k1} (IIA {v1:.3f}) is not drawn darker than {k2} (IIA {v2:.3f})")
    best = entry["best"]
    best_key = (best["layer"], units_text(best["units"])) if "units" in best else ("-", "-")
    if best["kind"] == "block":
        if outlined != [best_key]:
            failures.append(f"{name}: outlined cells {outlined}, expected the best site {best_key}")
    elif outlined:
        failures.append(f"{name}: the best site is {'elsewhere' if best['kind'] == 'elsewhere' else 'a random subset'}"
                        f", yet cells {outlined} are outlined")
    print(f"{name}: {len(cells)} cells ({len(layers)} layers x {columns} blocks), outlined {outlined}, "
          f"best in scan.json layer {best_key[0]} units {best_key[1]}")


def check_table(path, scan, failures):
    with open(path, encoding="utf-8") as f:
        lines = [line.rstrip("\n").split("\t") for line in f if line.strip()]
    header = lines[0]
    want = []
    positioned = any("position" in c for e in scan["variables"].values() for c in e["candidates"])
    for name, entry in scan["variables"].items():
        for c in entry["candidates"]:
            want.append((name, str(c["layer"]), c.get("position", ""), c["kind"], units_text(c["units"]),
                         str(c["iia"]["n"]), str(c["iia_changed"]["n"])))
    col = {h: i for i, h in enumerate(header)}
    try:
        got = [(r[col["variable"]], r[col["layer"]], r[col["position"]] if positioned else "", r[col["kind"]],
                r[col["units"]], r[col["n"]], r[col["changed_n"]])
               for r in lines[1:]]
    except (KeyError, IndexError) as e:
        failures.append(f"scan.tsv: header {header} or a row lacks {e}")
        return
    if sorted(got) != sorted(want):
        failures.append(f"scan.tsv: {len(got)} rows that differ from scan.json's {len(want)} candidates")


def main(argv):
    if len(argv) != 2:
        print("usage: check_scan.py SCAN_DIR", file=sys.stderr)
        return 2
    d = argv[1]
    failures = []
    try:
        with open(os.path.join(d, "scan.json"), encoding="utf-8") as f:
            scan = json.load(f)
        root = ET.parse(os.path.join(d, "scan.svg")).getroot()
        if root.tag != SVG + "svg":
            failures.append(f"scan.svg: root element {root.tag}, expected an svg element in the SVG namespace")
        panels = panels_of(root, failures)
        variables = panel_entries(scan["variables"])
        if set(panels) != set(variables):
            failures.append(f"scan.svg: heat maps for {sorted(panels)}, scan.json scans {sorted(variables)}")
        for name in sorted(set(panels) & set(variables)):
            check_variable(name, variables[name], panels[name], failures)
        check_table(os.path.join(d, "scan.tsv"), scan, failures)
    except (OSError, ValueError, KeyError, TypeError, ET.ParseError) as e:
        print(f"check_scan: malformed: {type(e).__name__}: {e}", file=sys.stderr)
        return 2
    for f in failures:
        print("check_scan: FAILED: " + f)
    print(f"checked {len(panels)} heat maps")
    return 1 if failures else 0


if __name__ == "__main__":
    sys.exit(main(sys.argv))
