"""Reading the files mapstore meets: NIfTI/GIFTI/CIFTI header facts, streamed hashing with a read
deadline, mesh files, user-written YAML/JSON files and the JSON Schemas they are checked against."""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from ._html import html_table  # noqa: F401
    from ._text import plural, text_table  # noqa: F401
    from ._regex import safe_regex  # noqa: F401
    from ._hashing import ReadDeadline, ReadTimeout, digest_file, sha256_file  # noqa: F401
    from ._foreign import DATA_EXTENSIONS, FOREIGN_EXTENSIONS, ForeignFacts, afni_brick, afni_extension, data_file, digest_map, foreign_format, read_foreign_header, read_foreign_volume  # noqa: F401
    from ._header import HeaderFacts, NIFTI1_SIZE, NIFTI2_SIZE, REAL_SCALAR_DTYPES, brain_models_key, expected_vertices, grid_fingerprint, header_prefix, parse_header, read_header, read_surface_header, surface_format, surface_grid_id  # noqa: F401
    from ._meshfiles import DATA_KINDS, MeshFile, mesh_file, read_mesh, read_vertex_data, write_mesh_description  # noqa: F401
    from ._schemafiles import schema_dir, schema_names, schema_text  # noqa: F401
    from ._userfiles import MAX_DEPTH, UserFile, check_user_doc, format_key_path, load_user_file, nesting_depth  # noqa: F401

# a name's module is imported when the name is first used: a query's command pays only for the
# table printer, not for the header readers (nibabel) it never calls
_HOME = {
    'html_table': '_html',
    'text_table': '_text',
    'plural': '_text',
    'safe_regex': '_regex',
    'ReadDeadline': '_hashing',
    'ReadTimeout': '_hashing',
    'digest_file': '_hashing',
    'sha256_file': '_hashing',
    'DATA_EXTENSIONS': '_foreign',
    'FOREIGN_EXTENSIONS': '_foreign',
    'ForeignFacts': '_foreign',
    'afni_brick': '_foreign',
    'afni_extension': '_foreign',
    'data_file': '_foreign',
    'digest_map': '_foreign',
    'foreign_format': '_foreign',
    'read_foreign_header': '_foreign',
    'read_foreign_volume': '_foreign',
    'HeaderFacts': '_header',
    'NIFTI1_SIZE': '_header',
    'NIFTI2_SIZE': '_header',
    'REAL_SCALAR_DTYPES': '_header',
    'brain_models_key': '_header',
    'expected_vertices': '_header',
    'grid_fingerprint': '_header',
    'header_prefix': '_header',
    'parse_header': '_header',
    'read_header': '_header',
    'read_surface_header': '_header',
    'surface_format': '_header',
    'surface_grid_id': '_header',
    'DATA_KINDS': '_meshfiles',
    'MeshFile': '_meshfiles',
    'mesh_file': '_meshfiles',
    'read_mesh': '_meshfiles',
    'read_vertex_data': '_meshfiles',
    'write_mesh_description': '_meshfiles',
    'schema_dir': '_schemafiles',
    'schema_names': '_schemafiles',
    'schema_text': '_schemafiles',
    'MAX_DEPTH': '_userfiles',
    'UserFile': '_userfiles',
    'check_user_doc': '_userfiles',
    'format_key_path': '_userfiles',
    'load_user_file': '_userfiles',
    'nesting_depth': '_userfiles',
}


def __getattr__(name: str):
    module = _HOME.get(name)
    if module is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(importlib.import_module(f".{module}", __name__), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_HOME))

__all__ = [
    "plural",
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
