"""What other image models cost a model: one set of nominal scenes, its images changed one way at a time.

Not a test: run by hand, e.g.

    python tests/benchmarks/image_variants.py models/demo --out out/image_variants
    python tests/benchmarks/image_variants.py MODEL --out DIR --images 8

The generator adds white Gaussian noise, and a model's noise smoothing (``detector.tile.noise``)
measures white noise. Images from a camera hold other kinds (common practice in planetary image
processing): noise made spatially correlated by resampling (a map-projected product is interpolated
from the camera's pixels), noise that grows with the signal (photon shot noise), offsets per detector
column (push-broom striping), coarse quantisation and sharpening by the product pipeline; and frost
whose albedo is mottled at the deposits' own scales, of which the generator's open frost holds little
(its albedo varies at 30 px and coarser, plus a fine grain). This script
renders one nominal set (its own image prefix ``NV...`` and seed, never the benchmark's), writes a
copy of it per variant with only its images changed (same consensus and truth), and scores the
model on each with ``frostvane evaluate`` at its own threshold. Writes ``image_variants.md`` and
``image_variants.json`` under ``--out``; the last line printed is one JSON object.
"""

import shutil
import sys
import time
from pathlib import Path

import numpy as np
from scipy import ndimage as ndi

REPO = Path(__file__).resolve().parents[2]


def _scaled(noise, grey_levels):
    return grey_levels * noise / max(float(noise.std()), 1e-9)


def _mottle(a, rng, grey_levels=6.0, wavelengths_px=(8.0, 64.0)):
    """Pink (1/f) noise kept to wavelengths of 8-64 px, built in the Fourier domain."""
    ky = np.fft.fftfreq(a.shape[0])[:, None]
    kx = np.fft.rfftfreq(a.shape[1])[None, :]
    k = np.hypot(ky, kx)
    band = (k >= 1.0 / wavelengths_px[1]) & (k <= 1.0 / wavelengths_px[0])
    spectrum = np.fft.rfft2(rng.normal(size=a.shape)) * np.where(band, 1.0 / np.maximum(k, 1e-9), 0.0)
    return a + _scaled(np.fft.irfft2(spectrum, s=a.shape), grey_levels)


#: Name -> (what it stands for, change of a float image in 8-bit grey levels with a generator).
IMAGE_VARIANTS = {
    "as rendered": ("the nominal images themselves", lambda a, rng: a),
    "white, 3 grey levels": ("more of the generator's own noise (smoothed at detection when above the model's range)",
                             lambda a, rng: a + rng.normal(0.0, 3.0, a.shape)),
    "correlated, 2 over 0.7 px": ("noise after resampling (a map-projected product)",
                                  lambda a, rng: a + _scaled(ndi.gaussian_filter(rng.normal(size=a.shape), 0.7), 2.0)),
    "correlated, 3 over 1.2 px": ("noise after stronger resampling or binning",
                                  lambda a, rng: a + _scaled(ndi.gaussian_filter(rng.normal(size=a.shape), 1.2), 3.0)),
    "signal-dependent": ("photon shot noise, standard deviation 0.35 sqrt(grey level)",
                         lambda a, rng: a + 0.35 * np.sqrt(np.maximum(a, 1.0)) * rng.normal(size=a.shape)),
    "column stripes, 2.5 grey levels": ("an offset per detector column (push-broom striping)",
                                        lambda a, rng: a + rng.normal(0.0, 2.5, (1, a.shape[1]))),
    "quantised to 6 bits": ("coarse quantisation (steps of 4 grey levels)", lambda a, rng: np.round(a / 4.0) * 4.0),
    "sharpened": ("an unsharp mask of the product pipeline (amount 1, 2 px)",
                  lambda a, rng: a + (a - ndi.gaussian_filter(a, 2.0))),
    "mottled frost, 6 grey levels": ("frost albedo varying at the deposits' scales (pink noise of 8-64 px "
                                     "wavelength)", _mottle),
}


def perturb_tileset(src, dst, variant, *, seed=0):
    """Copy tile set ``src`` to ``dst`` with every image changed by ``IMAGE_VARIANTS[variant]``.

    Pixels of the no-data value 0 stay 0 and valid pixels stay >= 1; 8- and 16-bit images keep their type
    (16-bit images are perturbed in units of 1/255 of their range).
    """
    from skimage import io as skio

    _, perturb = IMAGE_VARIANTS[variant]
    src, dst = Path(src), Path(dst)
    if dst.exists():
        shutil.rmtree(dst)
    shutil.copytree(src, dst)
    rng = np.random.default_rng(seed)
    for path in sorted((dst / "images").iterdir()):
        tile = skio.imread(path)
        top = float(np.iinfo(tile.dtype).max)
        unit = top / 255.0
        valid = tile != 0
        image = perturb(tile.astype(np.float64) / unit, rng) * unit
        out = np.clip(np.round(image), 1.0, top).astype(tile.dtype)
        out[~valid] = 0
        skio.imsave(path, out, check_contrast=False)


def main(argv=None):
    sys.path.insert(0, str(REPO))
    from tests.benchmarks.quality import run_reporting_errors

    run_reporting_errors("image_variants", _run, argv)


def _run(argv):
    from tests.benchmarks.quality import figure_cells, quality_parser, write_report

    parser = quality_parser(__doc__.splitlines()[0], seed=9191)
    args = parser.parse_args(argv)
    if args.images < 1:
        parser.error(f"--images must be at least 1; got {args.images}.")
    from detector.inference.model import load_model
    from training.synth import SCENE_PROFILES, synthesize_tileset
    from training.evaluation.benchmark import report_figures
    from training.evaluation.evaluate import evaluate_model

    load_model(args.model)  # refused here, before anything is rendered, if it cannot be read
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    base = out / "sets" / "rendered"
    started = time.perf_counter()
    print(f"rendering {args.images} nominal images (seed {args.seed})", flush=True)
    synthesize_tileset(base, n_images=args.images, tiles_per_image=4, seed=args.seed,
                       settings=SCENE_PROFILES["nominal"], image_prefix="NV", force=True)
    rows = {}
    for k, name in enumerate(IMAGE_VARIANTS):
        slug = "".join(c if c.isalnum() else "_" for c in name).strip("_")
        root = base if k == 0 else out / "sets" / slug
        if k:
            perturb_tileset(base, root, name, seed=args.seed + k)
        report = evaluate_model(args.model, root, out / "reports" / slug, force=True, workers=args.workers,
                                log=lambda *a: None)
        rows[name] = report_figures(report)
        print(f"[{k + 1}/{len(IMAGE_VARIANTS)}] {name}: fan F1 {rows[name]['fan_f1']:.3f}, "
              f"{time.perf_counter() - started:.0f} s", flush=True)

    ref = rows["as rendered"]
    lines = [
        "# Other image models\n",
        f"Model `{args.model}`; {args.images} nominal images of 4 tiles, seed {args.seed}, each copy with only its "
        "images perturbed; scored at the model's threshold. Change = against the images as rendered.\n",
        "| variant | stands for | fan F1 (P / R) | change | spot F1 | change | direction median / p90 | "
        "per-tile mean | Dice | fans missed | tiles smoothed | tiles flagged unfamiliar |",
        "| --- " * 12 + "|",
    ]
    for name, r in rows.items():
        lines.append(
            f"| {name} | {IMAGE_VARIANTS[name][0]} | {figure_cells(r, ref)} "
            f"{r['tiles_smoothed']} of {r['tiles']} | {r['tiles_unfamiliar']} of {r['tiles']} |")
    table = "\n".join(lines) + "\n"
    write_report(out, "image_variants", table, args, started, "variants", rows,
                 {name: round(r["fan_f1"], 4) for name, r in rows.items()})


if __name__ == "__main__":
    main()
