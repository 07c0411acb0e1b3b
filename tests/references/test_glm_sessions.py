"""A first-level model over sessions and runs, with t and F contrasts, as nilearn writes it.

Reference: nilearn's own ``FirstLevelModel`` fitted here and written by ``save_glm_to_bids``; its
stat-z maps are the answer for the t -> z and F -> z conversions (nilearn: z = Phi^-1(1 - p), p from
the t or F(df1, df2) distribution).  nilearn names the maps without ``ses`` and the designs with
``ses`` and ``run``: the four designs must all be found and their DOF summed (fixed effects).
The BOLD series are invented noise with an invented effect.
"""

from __future__ import annotations

import warnings

import nibabel as nib
import numpy as np
import pytest

import mapstore

N_SCANS = 30


@pytest.fixture(scope="module")
def sessions(tmp_path_factory):
    import pandas as pd
    from nilearn.glm.first_level import FirstLevelModel
    from nilearn.interfaces.bids import save_glm_to_bids

    base = tmp_path_factory.mktemp("sessions")
    rng = np.random.default_rng(3)
    imgs, designs = [], []
    for ses in (1, 2):
        for run in (1, 2):
            x = pd.DataFrame({"tap": rng.normal(size=N_SCANS), "rest": rng.normal(size=N_SCANS),
                              "constant": np.ones(N_SCANS)})
            effect = rng.normal(size=(8, 8, 8, 1)) * 2
            data = 100 + effect * x["tap"].to_numpy() + rng.normal(size=(8, 8, 8, N_SCANS))
            path = base / "raw" / f"sub-01_ses-{ses}_task-tap_run-{run}_bold.nii.gz"
            path.parent.mkdir(exist_ok=True)
            nib.save(nib.Nifti1Image(data.astype(np.float32), np.diag([3.0, 3.0, 3.0, 1.0])), str(path))
            imgs.append(str(path))
            designs.append(x)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        model = FirstLevelModel(mask_img=False, minimize_memory=False).fit(imgs, design_matrices=designs)
        save_glm_to_bids(model, {"tapF": np.array([[1, 0, 0], [0, 1, 0]]), "tapminusrest": "tap - rest"},
                         out_dir=base / "glm")
    store = base / "store"
    mapstore.index([base / "glm"], store, progress=False, jobs=1)
    grid = str(next((base / "glm").rglob("*_stat-t_statmap.nii.gz")))
    built = mapstore.build_features(store, "z", grid=grid, mask="intersection", stat="z", progress=False, jobs=1,
                                    where="m.stat IN ('t', 'F')")
    return base, store, built


def test_all_four_designs_are_found_and_their_dof_summed(sessions):
    _, store, _ = sessions
    rows = mapstore.open(store).sql("SELECT stat, dof, dof_source, dof_numerator FROM maps WHERE stat IN ('t', 'F')"
                                    ).to_pylist()
    assert {r["stat"] for r in rows} == {"t", "F"}
    assert all(r["dof"] == 4 * (N_SCANS - 3) and r["dof_source"] == "design" for r in rows)
    assert [r["dof_numerator"] for r in rows if r["stat"] == "F"] == [2.0]  # the F contrast's two rows


def test_t_and_f_maps_convert_to_nilearns_z(sessions):
    base, store, built = sessions
    assert built.n_problems == 0 and built.n_built == 2, built.summary()
    st = mapstore.open(store)
    fs = st.features("z")
    for r in st.sql("SELECT m.map_id, m.relpath, f.conversion FROM maps m JOIN features f USING (map_id) "
                    "WHERE f.feature_set = 'z'").to_pylist():
        stat = "F" if "_stat-F_" in r["relpath"] else "t"
        assert r["conversion"].startswith(f"{stat}->z")
        ref = nib.load(str(base / "glm" / r["relpath"].replace(f"_stat-{stat}_", "_stat-z_"))).get_fdata()
        got = fs.unmask(fs.matrix([r["map_id"]])[0]).reshape(ref.shape)
        ok = np.isfinite(got)
        assert ok.sum() == ref.size
        np.testing.assert_allclose(got[ok], ref[ok], atol=1e-3)
