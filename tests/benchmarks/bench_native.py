"""Native-space maps through their registration: mapstore's one-pass resampling against nitransforms'
own ``apply`` and against mapstore's affine path on the same files (same process, same run).

    python tests/benchmarks/bench_native.py [--maps 20]
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from pathlib import Path

import nibabel as nib
import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

import mapstore  # noqa: E402
from mapstore.targets import builtin_grid  # noqa: E402


def main() -> None:
    import nitransforms as nt
    from nitransforms.resampling import apply

    ap = argparse.ArgumentParser()
    ap.add_argument("--maps", type=int, default=20)
    args = ap.parse_args()
    work = Path(tempfile.mkdtemp(prefix="mapstore-bench-native-"))
    rng = np.random.default_rng(0)
    t = np.deg2rad(12.0)
    known = np.eye(4)
    known[:3, :3] = [[np.cos(t), -np.sin(t), 0], [np.sin(t), np.cos(t), 0], [0, 0, 1]]
    known[:3, 3] = [8.0, -10.0, 5.0]
    aff = np.array([[2.0, 0, 0, -100], [0, 2, 0, -130], [0, 0, 2, -80], [0, 0, 0, 1]])
    for space in ("T1w", "MNI152NLin2009cAsym"):  # the same files, native with a registration, and as template
        root = work / space
        (root).mkdir()
        (root / "dataset_description.json").write_text(json.dumps({"Name": space, "BIDSVersion": "1.9.0",
                                                                    "DatasetType": "derivative"}))
        for i in range(args.maps):
            sub = f"{i:03d}"
            d = root / f"sub-{sub}"
            d.mkdir()
            data = rng.normal(size=(100, 120, 90)).astype(np.float32)
            nib.save(nib.Nifti1Image(data, aff), str(d / f"sub-{sub}_task-x_space-{space}_contrast-a_stat-effect"
                                                         "_statmap.nii.gz"))
            if space == "T1w":
                nt.linear.Affine(known).to_filename(str(d / f"sub-{sub}_from-T1w_to-MNI152NLin2009cAsym_mode-"
                                                            "image_xfm.txt"), fmt="itk")
    out = {}
    for space in ("T1w", "MNI152NLin2009cAsym"):
        store = work / f"store-{space}"
        mapstore.index([work / space], store, progress=False, jobs=1)
        t0 = time.perf_counter()
        r = mapstore.build_features(store, grid="MNI152-2mm", progress=False, jobs=1)
        out[space] = (time.perf_counter() - t0, r.paths)
    g = builtin_grid("MNI152-2mm")
    ref = nib.Nifti1Image(np.zeros(g.shape, np.float32), g.affine_array)
    files = sorted((work / "T1w").rglob("*_statmap.nii.gz"))
    t0 = time.perf_counter()
    for f in files:
        xfm = nt.linear.load(str(next(f.parent.glob("*_xfm.txt"))), fmt="itk")
        np.asarray(apply(xfm, nib.load(str(f)), reference=ref, order=1).dataobj)
    hand = time.perf_counter() - t0
    n = args.maps
    print(f"{n} maps (100x120x90 float32) onto MNI152-2mm, one process")
    print(f"mapstore, registered path:   {out['T1w'][0]:6.2f} s  {out['T1w'][0] / n * 1e3:6.0f} ms/map  {out['T1w'][1]}")
    print(f"mapstore, affine path:       {out['MNI152NLin2009cAsym'][0]:6.2f} s  "
          f"{out['MNI152NLin2009cAsym'][0] / n * 1e3:6.0f} ms/map  {out['MNI152NLin2009cAsym'][1]}")
    print(f"nitransforms apply per map:  {hand:6.2f} s  {hand / n * 1e3:6.0f} ms/map (whole grid, no mask)")
    print(f"ratios: registered / affine {out['T1w'][0] / out['MNI152NLin2009cAsym'][0]:.2f}x, "
          f"registered / nitransforms {out['T1w'][0] / hand:.2f}x")


if __name__ == "__main__":
    main()
