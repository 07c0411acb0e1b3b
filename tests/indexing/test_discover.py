"""Discovery: entities, datasets, sidecar inheritance, name rules, participants."""

from __future__ import annotations

import os

import pytest
from bids.layout import parse_file_entities
from bids.layout.models import Config

from mapstore.indexing._datasets import find_datasets
from mapstore.indexing._metadata import MetadataOverrides, SidecarResolver, read_participants
from mapstore.indexing._names import EntityParser, NameRules
from mapstore.indexing._walk import walk_dataset
from mapstore.errors import RulesError

from ..conftest import make_derivative, write_json, write_map

NAMES = [
    "sub-01/func/sub-01_task-nback_contrast-twoVsZero_stat-t_statmap.nii.gz",
    "sub-02/ses-pre/func/sub-02_ses-pre_task-nback_run-03_contrast-a_stat-z_statmap.nii",
    "sub-A1/ses-2/func/sub-A1_ses-2_task-go_acq-fast_run-1_space-MNI152NLin2009cAsym_res-2_desc-smooth"
    "_contrast-goVsStop_stat-effect_statmap.nii.gz",
    "sub-03/anat/sub-03_space-MNI152NLin6Asym_desc-brain_mask.nii.gz",
    "task-nback_contrast-twoVsZero_stat-variance_statmap.nii.gz",
    "sub-04/func/sub-04_task-rest_rec-x_dir-AP_echo-2_contrast-b_stat-p_statmap.nii.gz",
]

# pybids' own parser, given the statistical-derivative entities as an extra config
STAT_CONFIG = Config("statmaps", entities=[
    {"name": "contrast", "pattern": r"[_/\\]+contrast-([a-zA-Z0-9+]+)"},
    {"name": "stat", "pattern": r"[_/\\]+stat-([a-zA-Z0-9+]+)"},
])


@pytest.mark.parametrize("relpath", NAMES)
def test_entities_agree_with_pybids(relpath):
    # reference: pybids parse_file_entities with its bundled bids + derivatives configs
    ref = parse_file_entities("/" + relpath, config=["bids", "derivatives", STAT_CONFIG])
    ours = EntityParser().parse(relpath)
    parser = EntityParser()
    ref_short = {parser.long_to_short.get(k, k): str(v) for k, v in ref.items()}
    assert ours == ref_short


def test_entities_without_extra_config_match_pybids_default():
    # reference: pybids' default configs (no contrast/stat): every entity pybids finds, we find too
    relpath = NAMES[2]
    ref = parse_file_entities("/" + relpath)
    parser = EntityParser()
    ours = parser.parse(relpath)
    for k, v in ref.items():
        assert ours[parser.long_to_short[k]] == str(v)
    assert ours["contrast"] == "goVsStop" and ours["stat"] == "effect"


def test_run_keeps_zero_padding():
    # pybids keeps run labels as padded ints ("03"); the catalog keeps the label text
    assert EntityParser().parse(NAMES[1])["run"] == "03"


def test_find_datasets_kinds(tmp_path):
    make_derivative(tmp_path / "a", name="a")
    make_derivative(tmp_path / "rawb", name="bee", raw=True)
    (tmp_path / "loose" / "sub-01").mkdir(parents=True)
    found, problems = find_datasets([tmp_path])
    keys = sorted(d.key for d in found)
    assert keys == ["a", "bee/bee-glm", "loose"]
    nested = next(d for d in found if d.key == "bee/bee-glm")
    assert nested.raw_root == str(tmp_path / "rawb") and nested.study == "bee"
    codes = {p.code for p in problems}
    assert "missing-dataset-description" in codes


def test_find_datasets_name_clash_gets_distinct_keys(tmp_path):
    make_derivative(tmp_path / "x", name="same")
    make_derivative(tmp_path / "y", name="same")
    found, problems = find_datasets([tmp_path])
    assert len({d.key for d in found}) == 2
    assert [p.code for p in problems].count("dataset-name-clash") == 2


def test_missing_root_is_a_problem(tmp_path):
    found, problems = find_datasets([tmp_path / "nope"])
    assert not found and problems[0].code == "missing-root"


def test_sidecar_inheritance(tmp_path):
    # BIDS inheritance principle: deeper, matching sidecars override shallower ones
    ds_root = make_derivative(tmp_path / "d")
    write_json(ds_root / "task-go_statmap.json", {"DegreesOfFreedom": 100, "InstitutionName": "X"})
    write_json(ds_root / "task-stop_statmap.json", {"DegreesOfFreedom": 1})
    write_json(ds_root / "sub-01" / "sub-01_task-go_statmap.json", {"DegreesOfFreedom": 90})
    write_json(ds_root / "sub-01" / "func" / "sub-01_task-go_contrast-a_stat-t_statmap.json", {"Extra": 1})
    write_json(ds_root / "sub-01" / "func" / "sub-01_task-go_bold.json", {"DegreesOfFreedom": 7})
    write_map(ds_root / "sub-01" / "func" / "sub-01_task-go_contrast-a_stat-t_statmap.nii.gz")
    write_map(ds_root / "sub-02" / "func" / "sub-02_task-go_contrast-a_stat-t_statmap.nii.gz")
    (ds,), _ = find_datasets([ds_root])
    parser = EntityParser()
    maps, jsons, problems = walk_dataset(ds, parser, NameRules())
    assert not problems and len(maps) == 2
    res = SidecarResolver(ds, jsons, parser)
    meta1, used1 = res.resolve(maps[0].relpath, maps[0].entities)
    meta2, used2 = res.resolve(maps[1].relpath, maps[1].entities)
    assert meta1 == {"DegreesOfFreedom": 90, "InstitutionName": "X", "Extra": 1}
    assert used1[0] == "task-go_statmap.json" and len(used1) == 3
    assert meta2 == {"DegreesOfFreedom": 100, "InstitutionName": "X"}


def test_bad_sidecar_is_a_warning(tmp_path):
    ds_root = make_derivative(tmp_path / "d")
    (ds_root / "task-go_statmap.json").write_text("{not json")
    write_map(ds_root / "sub-01" / "sub-01_task-go_contrast-a_stat-t_statmap.nii")
    (ds,), _ = find_datasets([ds_root])
    parser = EntityParser()
    maps, jsons, _ = walk_dataset(ds, parser, NameRules())
    res = SidecarResolver(ds, jsons, parser)
    meta, used = res.resolve(maps[0].relpath, maps[0].entities)
    assert meta == {} and res.problems[0].code == "bad-sidecar"
    assert "task-go_statmap.json" in res.problems[0].path


def test_dangling_symlink_and_missing_entities(tmp_path):
    ds_root = make_derivative(tmp_path / "d")
    f = ds_root / "sub-01" / "func"
    f.mkdir(parents=True)
    os.symlink("../.git/annex/objects/nothing", f / "sub-01_task-a_contrast-b_stat-t_statmap.nii.gz")
    write_map(f / "sub-01_task-a_contrast-b_statmap.nii")
    (ds,), _ = find_datasets([ds_root])
    maps, _, problems = walk_dataset(ds, EntityParser(), NameRules())
    assert not maps
    by_code = {p.code: p for p in problems}
    assert "annex" in by_code["dangling-symlink"].remedy
    assert by_code["missing-entity"].reason == "statmap file name lacks stat"


def test_name_rules_template_and_regex(tmp_path):
    rules_file = write_json(tmp_path / "rules.json", {"rules": [
        {"regex": r"(?P<sub>\w+)/spm/con_(?P<contrast>\d+)\.nii", "entities": {"stat": "effect"}},
        {"template": "sub-{sub}/**/{contrast}_{stat}.nii.gz", "datasets": ["legacy*"]},
    ]})
    rules = NameRules.load(rules_file)
    assert rules.match("any", "s01/spm/con_0003.nii")[1] == {"sub": "s01", "contrast": "0003", "stat": "effect"}
    assert rules.match("legacyA", "sub-01/a/b/faces_t.nii.gz")[1] == {"sub": "01", "contrast": "faces", "stat": "t"}
    assert rules.match("other", "sub-01/a/b/faces_t.nii.gz") is None


@pytest.mark.parametrize("doc, message", [
    ({"rules": [{"regex": "(?P<contrast>x)"}]}, "never sets 'stat'"),
    ({"rules": [{"regex": "(", "entities": {"stat": "t", "contrast": "c"}}]}, "invalid regex"),
    ({"rules": [{"template": "a", "regex": "b"}]}, "exactly one of"),
    ({"rules": [{"pattern": "a"}]}, "unknown key(s) ['pattern']"),
    ({"rule": []}, "a 'rules' list"),
])
def test_name_rules_errors(tmp_path, doc, message):
    f = write_json(tmp_path / "rules.json", doc)
    with pytest.raises(RulesError) as err:
        NameRules.load(f)
    assert message in str(err.value) and str(f) in str(err.value)


def test_rules_yaml_syntax_error_names_line(tmp_path):
    f = tmp_path / "rules.yaml"
    f.write_text("rules:\n  - regex: [unclosed\n")
    with pytest.raises(RulesError, match="line"):
        NameRules.load(f)


def test_overrides(tmp_path):
    f = write_json(tmp_path / "o.json", {"datasets": {"st*": {"lab": "L"}},
                                         "subjects": {"study/sub-01": {"site": "S2"}}})
    over = MetadataOverrides.load(f)
    assert over.apply("study", "01", {"site": "S1", "lab": None}) == {"site": "S2", "lab": "L"}
    assert over.apply("other", "01", {"site": "S1"}) == {"site": "S1"}
    bad = write_json(tmp_path / "b.json", {"datasets": {"x": {"color": "red"}}})
    with pytest.raises(RulesError, match="color"):
        MetadataOverrides.load(bad)


def test_participants_from_raw_parent(tmp_path):
    ds_root = make_derivative(tmp_path / "raw", name="r", raw=True)
    (tmp_path / "raw" / "participants.tsv").write_text("participant_id\tsite\tage\nsub-01\tA\t30\nsub-02\tn/a\t31\n")
    (ds,), _ = find_datasets([tmp_path / "raw"])
    rows, f, problems = read_participants(ds)
    assert f.endswith("raw/participants.tsv") and not problems
    assert rows[1] == {"participant_id": "sub-02", "site": None, "age": "31"}
    assert ds_root == __import__("pathlib").Path(ds.root)


def test_overrides_can_merge_participants(tmp_path):
    f = write_json(tmp_path / "o.json", {"subjects": {"b/sub-07": {"participant": "a/sub-01"}}})
    over = MetadataOverrides.load(f)
    assert over.apply("b", "07", {"site": None})["participant"] == "a/sub-01"
    bad = write_json(tmp_path / "b.json", {"datasets": {"b": {"participant": "x"}}})
    with pytest.raises(RulesError, match="participant"):
        MetadataOverrides.load(bad)


def test_example_files_are_valid():
    import jsonschema
    import yaml

    from mapstore.labels._vocabulary import load_vocabulary
    from mapstore.schemas import all_schemas

    ex = __import__("pathlib").Path(__file__).resolve().parents[2] / "examples"
    schemas = all_schemas()
    jsonschema.validate(yaml.safe_load((ex / "origins.yaml").read_text()), schemas["origins.schema.json"])
    jsonschema.validate(yaml.safe_load((ex / "name-rules.yaml").read_text()), schemas["name-rules.schema.json"])
    jsonschema.validate(yaml.safe_load((ex / "demo-concepts.yaml").read_text()), schemas["vocabulary.schema.json"])
    NameRules.load(ex / "name-rules.yaml")
    MetadataOverrides.load(ex / "origins.yaml")
    assert len(load_vocabulary(ex / "demo-concepts.yaml").concepts) == 8
