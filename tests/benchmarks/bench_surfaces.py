"""Benchmark: surface sets and parcel sets, against the hand loops a user would write with nilearn.

Part A, a surface set of N fsaverage5 maps (N hemisphere pairs, 2N GIFTI files):

* mapstore: ``index`` then ``build_features(grid="fsaverage5")`` (hashes, header facts,
  provenance, shards), each in a fresh process;
* the hand loop: ``nilearn.surface.load_surf_data`` of both files of every map, joined and
  cut to the same cortex mask, stacked into one array;
* the floor: reading every file's bytes once.

Part C, volume maps projected into a surface set (V maps on the MNI152 2 mm grid):

* mapstore: ``index`` then ``build_features(grid="fsaverage5")`` (the projection as a sparse
  matrix built once per grid and mesh);
* the hand loop: ``nilearn.surface.vol_to_surf`` (five depths, white to pial) on both
  hemispheres of every map, stacked.

Part B, a parcel set from a voxel set of R rows (MNI152 3 mm brain mask, 69,765 voxels, an
invented atlas of cubic blocks, 47 of them in the mask):

* mapstore: ``build_parcels``;
* the hand loop: the rows read in blocks of 500, painted into 4-D images, and
  ``NiftiLabelsMasker(strategy="mean")`` on each block.

Time and peak memory (VmHWM of each child process, workers included) are measured in the same
run and printed as ratios.

Usage::

    python tests/benchmarks/bench_surfaces.py [--maps 1000] [--rows 10000] [--volumes 200] [--jobs 2]
                                              [--workdir DIR]
"""

from __future__ import annotations

import argparse
import json
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent.parent))
sys.path.insert(0, str(HERE))
from _common import bench_dataset, floor  # noqa: E402
from bench_scale import _child, synthetic_catalog, synthetic_features  # noqa: E402

N5 = 10242


def make_surface_tree(root: Path, n_maps: int) -> list[Path]:
    """n_maps hemisphere pairs of random t maps on fsaverage5 (GIFTI written by nibabel)."""
    import nibabel as nib
    from nibabel.gifti import GiftiDataArray, GiftiImage

    ds = bench_dataset(root, "surfacestudy", 60)
    rng = np.random.default_rng(0)
    files = []
    for i in range(n_maps):
        sub, con = divmod(i, 10)
        for hemi in "LR":
            img = GiftiImage(darrays=[GiftiDataArray(rng.standard_normal(N5).astype(np.float32),
                                                     intent="NIFTI_INTENT_TTEST", datatype="NIFTI_TYPE_FLOAT32")])
            p = ds / f"sub-{sub:03d}" / f"sub-{sub:03d}_task-go_hemi-{hemi}_space-fsaverage5_contrast-c{con}_stat-t_" \
                "statmap.func.gii"
            p.parent.mkdir(parents=True, exist_ok=True)
            nib.save(img, str(p))
            files.append(p)
    return files


def surface_part(work: Path, n_maps: int, jobs: int) -> None:
    tree, store = work / "surf-tree", work / "surf-store"
    t0 = time.perf_counter()
    files = make_surface_tree(tree, n_maps)
    print(f"A. surface set: {n_maps} fsaverage5 maps ({len(files)} GIFTI files, "
          f"{sum(f.stat().st_size for f in files) / 1e6:.0f} MB), written in {time.perf_counter() - t0:.1f} s")
    fl = floor(files)
    idx = _child(f"import json, time, mapstore\nt=time.perf_counter()\n"
                 f"mapstore.index([{str(tree)!r}], {str(store)!r}, jobs={jobs}, progress=False)\n"
                 "print(json.dumps({'s': time.perf_counter()-t, 'mb': _peak()}))")
    feat = _child(f"import json, time, mapstore\nt=time.perf_counter()\n"
                  f"r=mapstore.build_features({str(store)!r}, grid='fsaverage5', jobs={jobs}, progress=False)\n"
                  "assert r.n_built == " + str(n_maps) + ", r.summary()\n"
                  "print(json.dumps({'s': time.perf_counter()-t, 'mb': _peak()}))")
    hand = _child(f"import json, time, glob, numpy as np\nt=time.perf_counter()\n"
                  "from nilearn.surface import load_surf_data\n"
                  "from mapstore.targets._surface import builtin_surface, cortex_mask\n"
                  "keep = cortex_mask(builtin_surface('fsaverage5'))\n"
                  f"lefts = sorted(glob.glob({str(tree)!r} + '/*/sub-*/*hemi-L*.func.gii'))\n"
                  "rows = [np.concatenate([load_surf_data(p), load_surf_data(p.replace('hemi-L', 'hemi-R'))])[keep]"
                  " for p in lefts]\n"
                  "X = np.stack(rows).astype(np.float32)\n"
                  f"assert X.shape[0] == {n_maps}\n"
                  "print(json.dumps({'s': time.perf_counter()-t, 'mb': _peak()}))")
    ours = idx["s"] + feat["s"]
    print(f"   read floor (bytes of every file once)        {fl:8.2f} s")
    print(f"   mapstore index                               {idx['s']:8.2f} s   peak {idx['mb']:6.0f} MB")
    print(f"   mapstore features --grid fsaverage5          {feat['s']:8.2f} s   peak {feat['mb']:6.0f} MB")
    print(f"   hand loop (nilearn load_surf_data + stack)   {hand['s']:8.2f} s   peak {hand['mb']:6.0f} MB")
    print(f"   ratios: index+features / hand loop = {ours / hand['s']:.2f}x, features alone / hand loop = "
          f"{feat['s'] / hand['s']:.2f}x, features / floor = {feat['s'] / max(fl, 1e-9):.1f}x, "
          f"peak features / hand loop = {feat['mb'] / hand['mb']:.2f}x")


def volume_part(work: Path, n_maps: int, jobs: int) -> None:
    from scipy import ndimage

    from mapstore.targets._volume import builtin_grid
    from tests.conftest import write_map

    tree, store = work / "vol-tree", work / "vol-store"
    grid = builtin_grid("MNI152-2mm")
    rng = np.random.default_rng(1)
    bases = [ndimage.gaussian_filter(rng.standard_normal(grid.shape), 3).astype(np.float32) * 40 for _ in range(4)]
    ds = bench_dataset(tree, "volumestudy", 30)
    t0 = time.perf_counter()
    for i in range(n_maps):
        sub, con = divmod(i, 10)
        write_map(ds / f"sub-{sub:03d}" / f"sub-{sub:03d}_task-go_space-MNI152NLin2009cAsym_contrast-c{con}_stat-t_"
                  "statmap.nii.gz", bases[i % 4] * (1 + 0.01 * i), grid.affine_array)
    print(f"\nC. volume maps into a surface set: {n_maps} maps on MNI152 2 mm, written in "
          f"{time.perf_counter() - t0:.1f} s")
    idx = _child(f"import json, time, mapstore\nt=time.perf_counter()\n"
                 f"mapstore.index([{str(tree)!r}], {str(store)!r}, jobs={jobs}, progress=False)\n"
                 "print(json.dumps({'s': time.perf_counter()-t, 'mb': _peak()}))")
    feat = _child(f"import json, time, mapstore\nt=time.perf_counter()\n"
                  f"r=mapstore.build_features({str(store)!r}, grid='fsaverage5', mask='all', jobs={jobs}, "
                  "progress=False)\n"
                  f"assert r.n_built == {n_maps}, r.summary()\n"
                  "print(json.dumps({'s': time.perf_counter()-t, 'mb': _peak()}))")
    hand = _child(f"import json, time, glob, warnings, numpy as np\nt=time.perf_counter()\n"
                  "from nilearn.datasets import load_fsaverage\nfrom nilearn.image import load_img\n"
                  "from nilearn.surface import vol_to_surf\nwarnings.simplefilter('ignore')\n"
                  "fsa = load_fsaverage('fsaverage5')\n"
                  f"paths = sorted(glob.glob({str(ds)!r} + '/sub-*/*.nii.gz'))\n"
                  "rows = []\n"
                  "for p in paths:\n"
                  "    img = load_img(p)\n"
                  "    rows.append(np.concatenate([vol_to_surf(img, fsa['pial'].parts[h], inner_mesh="
                  "fsa['white_matter'].parts[h], kind='depth', depth=[0.0, 0.25, 0.5, 0.75, 1.0]) "
                  "for h in ('left', 'right')]))\n"
                  "X = np.stack(rows).astype(np.float32)\n"
                  f"np.save({str(work / 'vol-hand.npy')!r}, X[:3])\n"
                  "print(json.dumps({'s': time.perf_counter()-t, 'mb': _peak()}))")
    import mapstore

    s = mapstore.open(store)
    fs = s.features(s.feature_sets()[0])
    first = s.sql("SELECT map_id FROM maps ORDER BY relpath LIMIT 3").column(0).to_pylist()
    same = np.allclose(fs.matrix(first), np.load(work / "vol-hand.npy"), rtol=1e-5, atol=1e-4)
    print(f"   mapstore index                               {idx['s']:8.2f} s   peak {idx['mb']:6.0f} MB")
    print(f"   mapstore features --grid fsaverage5          {feat['s']:8.2f} s   peak {feat['mb']:6.0f} MB")
    print(f"   hand loop (nilearn vol_to_surf per map)      {hand['s']:8.2f} s   peak {hand['mb']:6.0f} MB")
    print(f"   ratios: features / hand loop = {feat['s'] / hand['s']:.2f}x, index+features / hand loop = "
          f"{(idx['s'] + feat['s']) / hand['s']:.2f}x, peak {feat['mb'] / hand['mb']:.2f}x; "
          f"first rows equal to vol_to_surf's: {same}")


def parcel_part(work: Path, n_rows: int) -> None:
    import nibabel as nib

    from mapstore.targets._volume import builtin_grid, mni152_brain_mask

    store = work / "parcel-store"
    grid = builtin_grid("MNI152-3mm")
    mask = mni152_brain_mask(grid)
    t0 = time.perf_counter()
    synthetic_catalog(store, n_rows, n_datasets=max(1, n_rows // 500))
    synthetic_features(store, mask.n_voxels, grid=grid.to_json(), mask=mask.indices)
    print(f"\nB. parcel set from a voxel set of {n_rows:,} rows x {mask.n_voxels:,} voxels "
          f"({n_rows * mask.n_voxels * 4 / 1e9:.1f} GB), made in {time.perf_counter() - t0:.1f} s")
    ijk = np.indices(grid.shape)
    lab = (ijk[0] // 16) * 16 + (ijk[1] // 19) * 4 + (ijk[2] // 16) + 1  # invented blocks
    atlas = work / "blocks.nii.gz"
    nib.save(nib.Nifti1Image(lab.astype(np.int16), grid.affine_array), str(atlas))
    ours = _child(f"import json, time, mapstore\nt=time.perf_counter()\n"
                  f"r=mapstore.build_parcels({str(store)!r}, {str(atlas)!r}, source='synthetic', name='blocks')\n"
                  "print(json.dumps({'s': time.perf_counter()-t, 'mb': _peak(), 'p': r.n_features}))")
    hand = _child(f"import json, time, warnings, numpy as np, nibabel as nib, mapstore\nt=time.perf_counter()\n"
                  "from nilearn.maskers import NiftiLabelsMasker\nwarnings.simplefilter('ignore')\n"
                  f"fs = mapstore.open({str(store)!r}).features('synthetic')\n"
                  "m = fs.unmask(np.ones(fs.n_voxels)); mask_img = nib.Nifti1Image(np.isfinite(m).astype(np.uint8), "
                  "fs.target.affine_array)\n"
                  f"masker = NiftiLabelsMasker({str(atlas)!r}, mask_img=mask_img, strategy='mean').fit()\n"
                  "ids = fs.map_ids; out = []\n"
                  "for i in range(0, len(ids), 500):\n"
                  "    x = fs.matrix(ids[i:i+500])\n"
                  "    vol = np.zeros(fs.target.shape + (len(x),), np.float32)\n"
                  "    vol.reshape(-1, len(x))[fs.mask_indices] = x.T\n"
                  "    out.append(masker.transform(nib.Nifti1Image(vol, fs.target.affine_array)))\n"
                  "P = np.concatenate(out)\n"
                  "np.save(" + repr(str(work / "hand.npy")) + ", P[:5])\n"
                  "print(json.dumps({'s': time.perf_counter()-t, 'mb': _peak(), 'p': P.shape[1]}))")
    import mapstore

    fs = mapstore.open(store).features("blocks")
    same = np.allclose(fs.matrix(fs.map_ids[:5]), np.load(work / "hand.npy"), rtol=1e-4, atol=1e-5)
    print(f"   mapstore build_parcels ({ours['p']} parcels)       {ours['s']:8.2f} s   peak {ours['mb']:6.0f} MB")
    print(f"   hand loop (NiftiLabelsMasker, 500-row blocks) {hand['s']:8.2f} s   peak {hand['mb']:6.0f} MB")
    print(f"   ratios: time {ours['s'] / hand['s']:.2f}x, peak {ours['mb'] / hand['mb']:.2f}x; "
          f"first rows equal to the masker's: {same}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--maps", type=int, default=1000)
    ap.add_argument("--rows", type=int, default=10000)
    ap.add_argument("--volumes", type=int, default=200)
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--workdir")
    args = ap.parse_args()
    work = Path(args.workdir or tempfile.mkdtemp(prefix="mapstore-bench-surf-"))
    work.mkdir(parents=True, exist_ok=True)
    try:
        if args.maps:
            surface_part(work, args.maps, args.jobs)
        if args.volumes:
            volume_part(work, args.volumes, args.jobs)
        if args.rows:
            parcel_part(work, args.rows)
    finally:
        if not args.workdir:
            shutil.rmtree(work, ignore_errors=True)
    print(json.dumps({"maps": args.maps, "rows": args.rows, "volumes": args.volumes, "jobs": args.jobs}))


if __name__ == "__main__":
    main()
