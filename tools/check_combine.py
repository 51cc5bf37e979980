"""apply --combine, --threshold and the thin stage against NumPy, SciPy and scikit-image.

1. gradient: with `--bank sobel-x+sobel-y --combine gradient`, on the shipped
   line-a captures and on a random float32 .npy, the magnitude map equals
   numpy.hypot of the written sobel-x, sobel-y maps (rtol 1e-6)
   (https://numpy.org/doc/stable/reference/generated/numpy.hypot.html) and the
   orientation map equals numpy.degrees(numpy.arctan2(gy, gx)), differences
   taken modulo 360 (1e-6 relative / 1e-4 degrees)
   (https://numpy.org/doc/stable/reference/generated/numpy.arctan2.html);
   orientation lies in (-180, 180].
2. components: the stats.csv edge measures (above_fraction, components, the
   largest component's area, inclusive bounding box and centroid, ties to the
   component met first in raster order) equal scipy.ndimage.label
   (https://docs.scipy.org/doc/scipy/reference/generated/scipy.ndimage.label.html),
   scipy.ndimage.find_objects
   (https://docs.scipy.org/doc/scipy/reference/generated/scipy.ndimage.find_objects.html)
   and scipy.ndimage.center_of_mass
   (https://docs.scipy.org/doc/scipy/reference/generated/scipy.ndimage.center_of_mass.html),
   for --connectivity 8 (structure numpy.ones((3, 3))) and 4 (scipy's default
   cross). Maps: smoothed random fields of three densities, pure random maps,
   one-row / one-column maps, an empty map and hand-made tie cases, through
   `--bank identity --pad zero --threshold 0.5`; and every map of the line
   recipe (kernels/line-a-edges.recipe.toml) on the line-a captures at
   --threshold 0.3. With no component, largest_area is 0 and the other
   largest_* columns are empty (shared/schemas/stats.csv.json).
3. otsu: with `--threshold otsu` the stats.csv threshold of every map equals
   skimage.filters.threshold_otsu(map.astype(numpy.float64), nbins=256)
   (https://scikit-image.org/docs/stable/api/skimage.filters.html#skimage.filters.threshold_otsu)
   to 1e-6 of the map's range (the column holds an f32 cast), on the gradient
   maps of the line-a captures and on random maps; the components at that
   level are checked as in 2. The map is given to skimage as float64: for a
   float32 image skimage casts the counts to float32 and keeps float32 bin
   centres, so its between-class variances are summed in single precision
   and near-ties (the orientation maps' halves are almost mirror images) can
   go to another bin; the count of maps where that happens is printed.
4. thin: a recipe gaussian:sigma=S -> sobel-x+sobel-y -> thin (canny,
   keep=false) on synthetic float64 images (disc, rotated rectangle, both on a
   ramp; Gaussian noise) against skimage.feature.canny(image, sigma=S,
   low_threshold=low, high_threshold=high, mode="reflect")
   (https://scikit-image.org/docs/stable/api/skimage.feature.html#skimage.feature.canny);
   mode="reflect" (scipy's half-sample mirror) is the same border as tapmap's
   default symmetric pad. low/high are 0.1/0.3 of the maximum magnitude.
   Agreement: the fraction of tapmap edge pixels with a skimage edge pixel
   within Chebyshev distance 1 (scipy.ndimage.binary_dilation with a 3x3
   structure,
   https://docs.scipy.org/doc/scipy/reference/generated/scipy.ndimage.binary_dilation.html)
   and the reverse fraction, both >= 0.9 over the whole map (no border band
   is left out). The exact pixel agreement is printed as well. Note tapmap's
   Gaussian has radius ceil(3 sigma), skimage's int(4 sigma + 0.5).
5. gabor: a sinusoidal grating of wavelength 5 px whose intensity varies along
   (cos 45, sin 45) (x = column, y = row, downwards) through `--bank texture
   --combine gabor-energy --drop-sources`: in the interior, energy-45 has the
   highest mean and the angle map's median is 45 (a fact of the Gabor
   filter's definition: the even kernel at theta responds most to a carrier
   along theta); strongest equals the maximum of the energy maps and angle
   names the map that holds it.

Every check runs even when an earlier one fails; the exit status is non-zero
if any failed.

Usage: python3 tools/check_combine.py path/to/tapmap
"""
import csv
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from scipy import ndimage
from skimage.feature import canny
from skimage.filters import gaussian, threshold_otsu

SAMPLES = "sample_data/line-a"


def apply(tapmap, out, *args):
    subprocess.run([tapmap, "apply", "-q", "--save", "maps,stats", "--out", str(out), *args],
                   check=True)
    with open(Path(out) / "stats.csv", newline="") as f:
        rows = list(csv.DictReader(f))
    return {(r["path"], int(r["channel"])): r for r in rows}


def map_file(out, path):
    """DIR/maps/<path without extension>.npy for the stats.csv path column."""
    return Path(out) / "maps" / Path(path).with_suffix(".npy")


def maps_of(out, stats):
    """{path: (C×H×W array, [row of channel 0, 1, ...])}"""
    paths = sorted({p for p, _ in stats})
    result = {}
    for p in paths:
        a = np.load(map_file(out, p))
        rows = [stats[(p, c)] for c in range(a.shape[0])]
        result[p] = (a, rows)
    return result


def save_npy(folder, name, array):
    path = Path(folder) / f"{name}.npy"
    np.save(path, array)
    return str(path)


# ---------------------------------------------------------------- 1. gradient

def check_gradient(tapmap, work):
    rng = np.random.default_rng(11)
    src = work / "grad-in"
    src.mkdir()
    random_npy = save_npy(src, "random", rng.random((77, 103)).astype(np.float32))
    worst_mag = worst_ori = 0.0
    count = 0
    out_of_range = []
    for i, inputs in enumerate(([SAMPLES], [random_npy])):
        out = work / f"grad-{i}"
        stats = apply(tapmap, out, "--bank", "sobel-x+sobel-y", "--combine", "gradient", *inputs)
        for p, (a, rows) in maps_of(out, stats).items():
            names = [r["name"] for r in rows]
            assert names == ["sobel-x", "sobel-y", "magnitude", "orientation"], (p, names)
            gx, gy, mag, ori = (a[c].astype(np.float64) for c in range(4))
            want_mag = np.hypot(gx, gy)
            assert np.allclose(mag, want_mag, rtol=1e-6, atol=1e-30), p
            err = np.abs(mag - want_mag) / np.maximum(want_mag, 1e-30)
            worst_mag = max(worst_mag, float(err[want_mag > 0].max(initial=0.0)))
            want_ori = np.degrees(np.arctan2(gy, gx))
            d = np.abs((ori - want_ori + 180.0) % 360.0 - 180.0)
            assert np.all(d <= np.maximum(1e-4, 1e-6 * np.abs(want_ori))), (p, d.max())
            bad = np.argwhere(ori <= -180.0)
            for r, c in bad:
                out_of_range.append(f"{p} row {r} col {c}: gx {a[0, r, c]!r} gy {a[1, r, c]!r} "
                                    f"orientation {a[3, r, c]!r}")
            worst_ori = max(worst_ori, float(d.max()))
            count += 1
    print(f"gradient: {count} images; magnitude vs numpy.hypot max relative error "
          f"{worst_mag:.2e}; orientation vs numpy.arctan2 max error {worst_ori:.2e} deg "
          f"(mod 360); {len(out_of_range)} orientation samples outside (-180, 180]")
    for line in out_of_range[:3]:
        print(f"  outside (-180, 180]: {line}")
    assert not out_of_range, "orientation -180 written (documented range is (-180, 180])"


# -------------------------------------------------------------- 2. components

def scipy_measures(m, t, connectivity):
    mask = m.astype(np.float64) > t
    structure = np.ones((3, 3)) if connectivity == 8 else None
    labels, n = ndimage.label(mask, structure=structure)
    result = {"above_fraction": float(mask.mean()), "components": n}
    if n == 0:
        return result, None
    areas = np.bincount(labels.ravel())[1:]
    best = areas.max()
    tied = np.flatnonzero(areas == best) + 1
    # first met in raster order: the smallest flat index of a pixel
    flat = labels.ravel()
    first = {lab: int(np.flatnonzero(flat == lab)[0]) for lab in tied}
    lab = min(tied, key=lambda k: first[k])
    assert lab == tied.min()  # scipy numbers components in raster order
    sl = ndimage.find_objects(labels)[lab - 1]
    cy, cx = ndimage.center_of_mass(labels == lab)
    result.update(largest_area=int(best), largest_x0=sl[1].start, largest_y0=sl[0].start,
                  largest_x1=sl[1].stop - 1, largest_y1=sl[0].stop - 1,
                  largest_cx=cx, largest_cy=cy)
    return result, len(tied)


def compare_components(row, m, t, connectivity, what):
    want, ties = scipy_measures(m, t, connectivity)
    assert abs(float(row["above_fraction"]) - want["above_fraction"]) < 1e-12, (what, row, want)
    assert int(row["components"]) == want["components"], (what, row["components"], want)
    if ties is None:
        # stats.csv.json: largest_area 0 when there is none, the rest empty
        assert row["largest_area"] == "0", (what, "largest_area", row["largest_area"])
        for k in ("largest_x0", "largest_y0", "largest_x1", "largest_y1", "largest_cx",
                  "largest_cy"):
            assert row[k] == "", (what, k, row[k])
        return 0
    for k in ("largest_area", "largest_x0", "largest_y0", "largest_x1", "largest_y1"):
        assert int(row[k]) == want[k], (what, k, row[k], want[k])
    for k in ("largest_cx", "largest_cy"):
        assert abs(float(row[k]) - want[k]) <= 1e-9 * max(1.0, abs(want[k])), (what, k, row[k], want[k])
    return ties


def synthetic_maps(rng):
    maps = {}
    for name, shape, sigma, shift in (("smooth-64x80", (64, 80), 3.0, 0.0),
                                      ("smooth-200x150-sparse", (200, 150), 5.0, 0.8),
                                      ("smooth-200x150-dense", (200, 150), 4.0, -0.8),
                                      ("smooth-97x131", (97, 131), 2.0, 0.4)):
        z = ndimage.gaussian_filter(rng.standard_normal(shape), sigma)
        z = (z - z.mean()) / z.std()
        maps[name] = (0.5 + 0.25 * (z - shift)).astype(np.float32)
    maps["random-64x80"] = rng.random((64, 80)).astype(np.float32)
    maps["random-200x150-sparse"] = (rng.random((200, 150)) - 0.2).astype(np.float32)
    maps["random-150x200-dense"] = (rng.random((150, 200)) + 0.2).astype(np.float32)
    maps["row-1x57"] = rng.random((1, 57)).astype(np.float32)
    maps["column-37x1"] = rng.random((37, 1)).astype(np.float32)
    maps["empty-20x30"] = np.full((20, 30), 0.25, np.float32)
    # ties: a 9-pixel diagonal met first (one component under 8, nine under 4),
    # then two 3x3 squares; the lower-left square comes after the right one
    tie = np.zeros((40, 50), np.float32)
    for k in range(9):
        tie[2 + k, 40 - k] = 1.0
    tie[5:8, 45:48] = 1.0
    tie[20:23, 1:4] = 1.0
    tie[30:32, 10:12] = 1.0
    maps["tie-diagonal"] = tie
    # a U whose right arm starts above its left arm, tied with a later bar
    u = np.zeros((30, 30), np.float32)
    u[3:10, 5] = 1.0
    u[1:10, 12] = 1.0
    u[9, 5:13] = 1.0
    n_u = int(u.sum())
    u[20, 2:2 + n_u] = 1.0
    maps["tie-u"] = u
    return maps


def check_components(tapmap, work):
    rng = np.random.default_rng(5)
    src = work / "cc-in"
    src.mkdir()
    maps = synthetic_maps(rng)
    files = [save_npy(src, name, m) for name, m in maps.items()]
    ties_seen = 0
    checked = 0
    for connectivity in (8, 4):
        out = work / f"cc-{connectivity}"
        stats = apply(tapmap, out, "--bank", "identity", "--pad", "zero", "--threshold", "0.5",
                      "--connectivity", str(connectivity), *files)
        for p, (a, rows) in maps_of(out, stats).items():
            m = maps[Path(p).stem]
            assert np.array_equal(a[0], m), p  # identity passes the map through
            assert float(rows[0]["threshold"]) == 0.5
            ties = compare_components(rows[0], a[0], 0.5, connectivity, (p, connectivity))
            ties_seen += ties > 1
            checked += 1
    print(f"components: {checked} synthetic maps (connectivity 8 and 4) match "
          f"scipy.ndimage.label/find_objects/center_of_mass; {ties_seen} had tied largest areas")

    for connectivity in (8, 4):
        out = work / f"cc-recipe-{connectivity}"
        stats = apply(tapmap, out, "--recipe", "kernels/line-a-edges.recipe.toml",
                      "--threshold", "0.3", "--connectivity", str(connectivity), SAMPLES)
        n = comps = 0
        names = set()
        for p, (a, rows) in maps_of(out, stats).items():
            for c, row in enumerate(rows):
                t = float(row["threshold"])
                assert abs(t - 0.3) <= 1e-7, row  # the column holds an f32 cast
                compare_components(row, a[c], t, connectivity, (p, c, connectivity))
                names.add(row["name"])
                n += 1
                comps += int(row["components"])
        print(f"components: line recipe at 0.3, connectivity {connectivity}: {n} maps "
              f"({', '.join(sorted(names))}), {comps} components in all, match scipy")


# -------------------------------------------------------------------- 3. otsu

def check_otsu(tapmap, work):
    rng = np.random.default_rng(9)
    src = work / "otsu-in"
    src.mkdir()
    maps = synthetic_maps(rng)
    del maps["empty-20x30"]
    maps["bimodal"] = np.concatenate([rng.normal(0.2, 0.05, 3000),
                                      rng.normal(0.7, 0.1, 2000)]).reshape(50, 100).astype(np.float32)
    files = [save_npy(src, name, m) for name, m in maps.items()]
    for label, args in (("line-a gradient maps", ["--bank", "sobel-x+sobel-y", "--combine",
                                                   "gradient", SAMPLES]),
                        ("random maps", ["--bank", "identity", "--pad", "zero", *files])):
        out = work / f"otsu-{len(label)}"
        stats = apply(tapmap, out, "--threshold", "otsu", *args)
        worst = 0.0
        worst_mag = 0.0
        n = single = 0
        for p, (a, rows) in maps_of(out, stats).items():
            for c, row in enumerate(rows):
                m = a[c]
                span = float(m.max()) - float(m.min())
                want = float(threshold_otsu(m.astype(np.float64), nbins=256))
                single += abs(float(threshold_otsu(m, nbins=256)) - want) > 1e-6 * span
                got = float(row["threshold"])
                rel = abs(got - want) / span
                assert rel <= 1e-6, (p, row["name"], got, want, rel * 256, "bins")
                worst = max(worst, rel)
                if row["name"] == "magnitude":
                    worst_mag = max(worst_mag, rel)
                compare_components(row, m, got, 8, (p, c, "otsu"))
                n += 1
        extra = f" (magnitude maps {worst_mag:.2e})" if "gradient" in label else ""
        print(f"otsu: {label}: {n} maps, stats threshold vs skimage threshold_otsu max "
              f"difference {worst:.2e} of the map range{extra}; components match scipy; "
              f"skimage given the float32 map itself differs on {single}")


# -------------------------------------------------------------------- 4. thin

def test_images(rng):
    images = []
    h, w = 128, 128
    y, x = np.mgrid[:h, :w]
    disc = np.where((x - 67.7) ** 2 + (y - 60.3) ** 2 < 30.0 ** 2, 0.8, 0.2)
    images.append(("disc-128x128", disc + rng.normal(0, 0.05, disc.shape), 1.4))
    h, w = 160, 200
    y, x = np.mgrid[:h, :w]
    a = np.radians(30.0)
    u = (x - 97.2) * np.cos(a) + (y - 81.6) * np.sin(a)
    v = -(x - 97.2) * np.sin(a) + (y - 81.6) * np.cos(a)
    rect = np.where((np.abs(u) < 55) & (np.abs(v) < 30), 0.75, 0.25)
    images.append(("rect-160x200", rect + rng.normal(0, 0.05, rect.shape), 1.4))
    h, w = 150, 170
    y, x = np.mgrid[:h, :w]
    both = 0.1 + 0.3 * x / w
    both = np.where((x - 50) ** 2 + (y - 45) ** 2 < 25.0 ** 2, both + 0.45, both)
    u = (x - 115) * np.cos(-a) + (y - 100) * np.sin(-a)
    v = -(x - 115) * np.sin(-a) + (y - 100) * np.cos(-a)
    both = np.where((np.abs(u) < 35) & (np.abs(v) < 20), 0.9 - both * 0.5, both)
    images.append(("both-150x170", both + rng.normal(0, 0.04, both.shape), 2.0))
    return [(n, np.clip(im, 0.0, 1.0).astype(np.float64), s) for n, im, s in images]


RECIPE = """\
[[stage]]
conv = "gaussian:sigma={sigma}"
pad = "symmetric"

[[stage]]
conv = "sobel-x+sobel-y"
pad = "symmetric"

[[stage]]
thin = "canny"
low = {low!r}
high = {high!r}
keep = false
"""


def check_thin(tapmap, work):
    rng = np.random.default_rng(3)
    src = work / "thin-in"
    src.mkdir()
    near = np.ones((3, 3), bool)
    worst = 1.0
    for name, image, sigma in test_images(rng):
        smooth = gaussian(image, sigma=sigma, mode="reflect", preserve_range=True)
        top = float(np.hypot(ndimage.sobel(smooth, axis=1), ndimage.sobel(smooth, axis=0)).max())
        low, high = 0.1 * top, 0.3 * top
        recipe = work / f"{name}.recipe.toml"
        recipe.write_text(RECIPE.format(sigma=sigma, low=low, high=high))
        path = save_npy(src, name, image)
        out = work / f"thin-{name}"
        stats = apply(tapmap, out, "--recipe", str(recipe), path)
        assert [stats[k]["name"] for k in sorted(stats)] == ["edges"], stats.keys()
        ours_map = np.load(map_file(out, Path(path).name))[0]
        assert set(np.unique(ours_map)) <= {0.0, 1.0}
        ours = ours_map > 0.5
        theirs = canny(image, sigma=sigma, low_threshold=low, high_threshold=high, mode="reflect")
        assert not ours[[0, -1], :].any() and not ours[:, [0, -1]].any(), name
        fwd = (ours & ndimage.binary_dilation(theirs, near)).sum() / max(ours.sum(), 1)
        back = (theirs & ndimage.binary_dilation(ours, near)).sum() / max(theirs.sum(), 1)
        differ = int((ours != theirs).sum())
        same_edge = (ours & theirs).sum() / max((ours | theirs).sum(), 1)
        print(f"thin: {name} sigma {sigma} low {low:.3f} high {high:.3f}: tapmap {ours.sum()} "
              f"edge pixels, skimage {theirs.sum()}; tapmap near skimage {fwd:.4f}, skimage "
              f"near tapmap {back:.4f}; identical edge pixels {same_edge:.4f} of the union "
              f"({differ} pixels differ)")
        assert ours.sum() > 0 and theirs.sum() > 0
        worst = min(worst, fwd, back)
    assert worst >= 0.9, worst


# ------------------------------------------------------------------- 5. gabor

def check_gabor(tapmap, work):
    src = work / "gabor-in"
    src.mkdir()
    h, w = 96, 112
    y, x = np.mgrid[:h, :w].astype(np.float64)
    c = np.cos(np.radians(45.0))
    grating = (0.5 + 0.5 * np.cos(2 * np.pi * (x * c + y * c) / 5.0)).astype(np.float32)
    path = save_npy(src, "grating-45", grating)
    out = work / "gabor"
    stats = apply(tapmap, out, "--bank", "texture", "--combine", "gabor-energy", "--drop-sources",
                  path)
    a = np.load(map_file(out, Path(path).name))
    names = [stats[("grating-45.npy", k)]["name"] for k in range(a.shape[0])]
    assert names == ["energy-0", "energy-45", "energy-90", "energy-135", "strongest", "angle"], names
    b = 16  # the kernels are 25×25: leave the padded band out
    inner = a[:, b:-b, b:-b].astype(np.float64)
    means = inner[:4].mean(axis=(1, 2))
    best = names[int(np.argmax(means))]
    median = float(np.median(inner[5]))
    strongest_err = float(np.abs(a[4] - a[:4].max(axis=0)).max())
    angles = np.array([0.0, 45.0, 90.0, 135.0])
    angle_ok = float(np.mean(a[5] == angles[np.argmax(a[:4], axis=0)]))
    print("gabor: 45-degree grating, interior mean energy "
          + ", ".join(f"{n} {m:.4g}" for n, m in zip(names, means))
          + f"; highest {best}; angle median {median:g}; strongest vs max of energies "
          f"{strongest_err:.2e}; angle names the argmax at {100 * angle_ok:.2f}% of pixels")
    assert best == "energy-45" and median == 45.0
    assert strongest_err == 0.0 and angle_ok == 1.0


def main():
    tapmap = str(Path(sys.argv[1]).resolve())
    start = time.monotonic()
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        failed = []
        for check in (check_gradient, check_components, check_otsu, check_thin, check_gabor):
            try:
                check(tapmap, work)
            except AssertionError as e:
                failed.append(check.__name__)
                print(f"FAILED {check.__name__}: {e!r}")
    took = time.monotonic() - start
    if failed:
        sys.exit(f"{len(failed)} check(s) failed ({', '.join(failed)}) in {took:.1f} s")
    print(f"all checks passed in {took:.1f} s")


main()
