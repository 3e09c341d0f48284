#!/usr/bin/env python3
"""Independent check of receptor's colour key (assets/colour-key.json).

Uses colour-science (tested with 0.4.7) and numpy (tested with 2.4) instead of receptor's own
conversion code, and prints the numbers quoted in src/report/colour.rs:
  * the Machado, Oliveira & Fernandes (2009) matrices for protanopia / deuteranopia at severity 1.0
    from colour-science's table, compared with the values typed into src/report/colour.rs;
  * every stop as 8-bit sRGB (the FIXTURE_STOP_SRGB table of the Rust tests);
  * L* symmetry of the key (sampled), the gamut, and CIE76 Delta E between the ends and the centre
    under normal vision and both simulations;
  * the hues (CIELAB hue angle, CIE 15): no stop of chroma above 10 in the blue (250-290 degrees)
    or orange (35-75 degrees) range, the arms not red against green, the negative arm at b* < 0
    and the positive arm at b* > 0 (the violet-yellow direction that readers with red-green
    colour-vision deficiency keep).

Sources: CIELAB and the D65 white per CIE 15 (colour-science's XYZ_to_Lab / Lab_to_XYZ);
sRGB per IEC 61966-2-1; the colour-vision simulation of Machado, Oliveira & Fernandes (2009),
"A Physiologically-based Model for Simulation of Color Vision Deficiency", IEEE TVCG 15(6).

Usage: pip install colour-science numpy && python3 scripts/check_colour_key.py
Exits non-zero when a property fails.
"""

import json
import pathlib
import sys

import colour
import numpy as np

ROOT = pathlib.Path(__file__).resolve().parent.parent
KEY = json.loads((ROOT / "assets" / "colour-key.json").read_text())

# The values in src/report/colour.rs (PROTANOPIA, DEUTERANOPIA).
RUST_PROTAN = np.array([[0.152286, 1.052583, -0.204868],
                        [0.114503, 0.786281, 0.099216],
                        [-0.003882, -0.048116, 1.051998]])
RUST_DEUTAN = np.array([[0.367322, 0.860646, -0.227968],
                        [0.280085, 0.672501, 0.047413],
                        [-0.011820, 0.042940, 0.968881]])

D65 = colour.CCS_ILLUMINANTS["CIE 1931 2 Degree Standard Observer"]["D65"]
failures = []


def check(ok, what):
    print(("ok   " if ok else "FAIL ") + what)
    if not ok:
        failures.append(what)


def lab_to_linear(lab):
    xyz = colour.Lab_to_XYZ(np.asarray(lab, dtype=float), D65)
    return colour.XYZ_to_sRGB(xyz, apply_cctf_encoding=False)


def linear_to_srgb8(lin):
    enc = colour.cctf_encoding(np.clip(lin, 0.0, 1.0), function="sRGB")
    return np.round(enc * 255.0).astype(int)


def srgb8_to_lab(rgb8, matrix=None):
    lin = colour.cctf_decoding(np.asarray(rgb8) / 255.0, function="sRGB")
    if matrix is not None:
        lin = np.clip(lin @ matrix.T, 0.0, 1.0)
    return colour.XYZ_to_Lab(colour.sRGB_to_XYZ(lin, apply_cctf_decoding=False), D65)


print("colour-science", colour.__version__, "numpy", np.__version__)
protan = colour.blindness.matrix_cvd_Machado2009("Protanomaly", 1.0)
deutan = colour.blindness.matrix_cvd_Machado2009("Deuteranomaly", 1.0)
check(np.allclose(protan, RUST_PROTAN, atol=5e-7), "protanopia matrix matches colour-science")
check(np.allclose(deutan, RUST_DEUTAN, atol=5e-7), "deuteranopia matrix matches colour-science")

stops = KEY["stops"]
ts = np.array([s["t"] for s in stops])
labs = np.array([[s["l"], s["a"], s["b"]] for s in stops])
print("stops (t, L*, a*, b*, C*, h, sRGB):")
fixture = []
for t, lab in zip(ts, labs):
    rgb = linear_to_srgb8(lab_to_linear(lab))
    fixture.append(rgb.tolist())
    c = np.hypot(lab[1], lab[2])
    h = np.degrees(np.arctan2(lab[2], lab[1])) % 360
    print(f"  {t:+.2f}  {lab[0]:6.2f} {lab[1]:7.2f} {lab[2]:7.2f}  C*={c:5.2f} h={h:5.1f}  {rgb.tolist()}")
print("FIXTURE_STOP_SRGB =", fixture)

# Dense sampling of the key, interpolated linearly in CIELAB as the Rust code does.
grid = np.linspace(-1.0, 1.0, 401)
dense = np.stack([np.interp(grid, ts, labs[:, k]) for k in range(3)], axis=1)
lin = lab_to_linear(dense)
check(lin.min() > -1e-3 and lin.max() < 1 + 1e-3, f"inside sRGB gamut (linear range {lin.min():.4f}..{lin.max():.4f})")
rgb8 = linear_to_srgb8(lin)
seen = srgb8_to_lab(rgb8)
half = len(grid) // 2
asym = np.abs(seen[half:, 0] - seen[half::-1, 0]).max()
check(asym < 1.0, f"8-bit L*(+t) vs L*(-t) differ by at most {asym:.2f}")
dl = seen[half, 0] - 0.5 * (seen[half:, 0] + seen[half::-1, 0])
check(np.all(np.diff(dl) > -0.5), "|dL*| from centre is monotone (0.5 allowance for 8-bit rounding)")
centre = seen[half]
check(np.hypot(centre[1], centre[2]) < 5.0, f"centre chroma {np.hypot(centre[1], centre[2]):.2f} < 5")

for name, m in [("normal", None), ("protanopia", protan), ("deuteranopia", deutan)]:
    n, c, p = (srgb8_to_lab(rgb8[i], m) for i in (0, half, -1))
    ends = np.linalg.norm(n - p)
    nc = np.linalg.norm(n - c)
    pc = np.linalg.norm(p - c)
    check(min(ends, nc, pc) > 40.0,
          f"{name}: dE76 ends {ends:.1f}, negative-centre {nc:.1f}, positive-centre {pc:.1f}")
    nan = srgb8_to_lab(np.array(KEY["no_value"]), m)
    closest = np.linalg.norm(srgb8_to_lab(rgb8, m) - nan, axis=1).min()
    check(closest > 40.0, f"{name}: no-value colour at least dE76 {closest:.1f} from the key")

hues = np.degrees(np.arctan2(labs[:, 2], labs[:, 1])) % 360
chromas = np.hypot(labs[:, 1], labs[:, 2])
vivid = chromas > 10.0
check(not np.any(vivid & (hues >= 250) & (hues <= 290)), "no stop in the blue hue range")
check(not np.any(vivid & (hues >= 35) & (hues <= 75)), "no stop in the orange hue range")
red = lambda h: (15 <= h <= 45) or h >= 345
green = lambda h: 120 <= h <= 180
check(not ((red(hues[0]) and green(hues[-1])) or (green(hues[0]) and red(hues[-1]))),
      f"ends not red against green (hues {hues[0]:.0f} and {hues[-1]:.0f})")
check(labs[0, 2] < -20 and labs[-1, 2] > 20, "negative arm at b* < 0, positive arm at b* > 0")

sys.exit(1 if failures else 0)
