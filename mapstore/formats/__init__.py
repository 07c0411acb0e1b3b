"""Reading the files mapstore meets: NIfTI/GIFTI/CIFTI header facts, streamed hashing with a read
deadline, mesh files, user-written YAML/JSON files and the JSON Schemas they are checked against."""

from __future__ import annotations

from ._html import html_table
from ._text import text_table
from ._regex import safe_regex
from ._hashing import ReadDeadline, ReadTimeout, digest_file, sha256_file
from ._foreign import (
    DATA_EXTENSIONS,
    FOREIGN_EXTENSIONS,
    ForeignFacts,
    afni_brick,
    afni_extension,
    data_file,
    digest_map,
    foreign_format,
    read_foreign_header,
    read_foreign_volume,
)
from ._header import (
    HeaderFacts,
    NIFTI1_SIZE,
    NIFTI2_SIZE,
    REAL_SCALAR_DTYPES,
    brain_models_key,
    expected_vertices,
    grid_fingerprint,
    header_prefix,
    parse_header,
    read_header,
    read_surface_header,
    surface_format,
    surface_grid_id,
)
from ._meshfiles import DATA_KINDS, MeshFile, mesh_file, read_mesh, read_vertex_data, write_mesh_description
from ._schemafiles import schema_dir, schema_names, schema_text
from ._userfiles import MAX_DEPTH, UserFile, check_user_doc, format_key_path, load_user_file, nesting_depth


__all__ = [
    "afni_brick",
    "afni_extension",
    "DATA_EXTENSIONS",
    "data_file",
    "digest_map",
    "FOREIGN_EXTENSIONS",
    "ForeignFacts",
    "foreign_format",
    "read_foreign_header",
    "read_foreign_volume",
    "brain_models_key",
    "check_user_doc",
    "DATA_KINDS",
    "digest_file",
    "expected_vertices",
    "format_key_path",
    "grid_fingerprint",
    "header_prefix",
    "HeaderFacts",
    "load_user_file",
    "safe_regex",
    "MAX_DEPTH",
    "nesting_depth",
    "mesh_file",
    "MeshFile",
    "NIFTI1_SIZE",
    "NIFTI2_SIZE",
    "parse_header",
    "read_header",
    "read_mesh",
    "read_surface_header",
    "read_vertex_data",
    "ReadDeadline",
    "ReadTimeout",
    "REAL_SCALAR_DTYPES",
    "schema_dir",
    "schema_names",
    "schema_text",
    "sha256_file",
    "html_table",
    "text_table",
    "surface_format",
    "surface_grid_id",
    "UserFile",
    "write_mesh_description",
]
