"""Property-based robustness of the export parser, the file load and the profile loader.

Random bytes, random delimiters and decimal marks, random column orders, dropped and
repeated columns, ragged rows and hostile cell text must end in records, quarantine or a
clear error (``FileRejected`` for an export, ``ConfigError`` for a profile): never an
unhandled exception, never a lost or double-counted row. Example counts are bounded so
the module runs in well under a minute.
"""

from __future__ import annotations

import json
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pipeline.errors import ConfigError, FileRejected
from pipeline.ingest.load import ingest_file
from pipeline.ingest.parse import REASON, parse_export
from pipeline.ingest.read import ROW, read_export
from pipeline.profile import Profile, load_profile
from pipeline.store import open_store

FIXTURES = Path(__file__).parent / "fixtures"
MINIMAL = (FIXTURES / "profiles" / "minimal.toml").read_text(encoding="utf-8")
SOURCE_COLUMNS = ["id", "mrn", "ward", "collected", "resulted", "type", "device", "fio2", "ph", "pco2", "po2", "hco3"]
DELIMITERS = [",", ";", "\t", "|"]
KEY = b"fuzz-key-0123456789abcdef"

FUZZ = settings(
    max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large]
)

TYPICAL_CELLS = [
    "", " ", "S1", "P1", "W1", "A", "V", "RA", "NC", "Z", "7.40", "7,40", "40", "95", "0.21", "21", "12.5",
    "2026-03-02 10:00", "2026-03-29 01:30", "02/03/2026 10:00", ">600", "<5", "<= 7", "NaN", "inf", "-1", "1e309",
    "haemolysed", "clotted", "n/a", "-", '"', '""', "'", "\n", "\r\n", ",", ";", "\t", "|", "=cmd()", "<script>",
    "1.23E+11", "0001", "\u00e9", "\u22125",
]  # fmt: skip
cells = st.one_of(
    st.sampled_from(TYPICAL_CELLS),
    st.text(alphabet=st.characters(exclude_categories=("Cs",)), max_size=10),
)


@contextmanager
def scratch() -> Iterator[Path]:
    with tempfile.TemporaryDirectory() as folder:
        yield Path(folder)


def profile_text(delimiter: str, decimal_mark: str, encoding: str = "utf-8") -> str:
    text = MINIMAL.replace('delimiter = ","', f"delimiter = {json.dumps(delimiter)}")
    text = text.replace('decimal_mark = "."', f"decimal_mark = {json.dumps(decimal_mark)}")
    return text.replace('encoding = "utf-8"', f"encoding = {json.dumps(encoding)}")


def render(rows: list[list[str]], delimiter: str, quote_all: bool, line_end: str) -> str:
    def one(cell: str) -> str:
        if quote_all or any(c in cell for c in (delimiter, '"', "\n", "\r")):
            return '"' + cell.replace('"', '""') + '"'
        return cell

    return line_end.join(delimiter.join(one(c) for c in row) for row in rows)


@st.composite
def exports(draw: st.DrawFn) -> tuple[bytes, str, str]:
    """(file bytes, profile delimiter, profile decimal mark): a mangled export of the test layout."""
    file_delimiter = draw(st.sampled_from(DELIMITERS))
    profile_delimiter = draw(st.sampled_from([file_delimiter] * 4 + DELIMITERS))
    decimal_mark = "," if profile_delimiter != "," and draw(st.booleans()) else "."
    header = draw(st.permutations(SOURCE_COLUMNS))
    header = header[: draw(st.integers(len(header) - 3, len(header)))]  # maybe lose a few columns
    if draw(st.booleans()):
        header = [*header, draw(st.sampled_from(["extra", "comment", "ID", header[0]]))]  # extra or repeated
    width = len(header)
    rows = draw(
        st.lists(
            st.lists(cells, min_size=max(width - 1, 0), max_size=width + 1),  # ragged rows too
            max_size=12,
        )
    )
    text = render([header, *rows], file_delimiter, draw(st.booleans()), draw(st.sampled_from(["\n", "\r\n"])))
    if draw(st.booleans()):
        text += "\n"
    data = text.encode("utf-8")
    if draw(st.booleans()):
        data = b"\xef\xbb\xbf" + data
    cut = draw(st.integers(0, 3))
    if cut == 1 and data:  # cut off mid-write
        data = data[: draw(st.integers(0, len(data) - 1))]
    elif cut == 2:  # a stray byte: NUL, Latin-1, or random
        at = draw(st.integers(0, len(data)))
        data = data[:at] + draw(st.sampled_from([b"\x00", b"\xe9", b"\xff\xfe", b"\r"])) + data[at:]
    return data, profile_delimiter, decimal_mark


def check_parse(path: Path, profile: Profile) -> int | None:
    """Read and parse; return the number of records, or None when the file is rejected."""
    try:
        raw = read_export(path, profile)
        parsed = parse_export(raw, profile)
    except FileRejected as err:
        assert err.reason_code and err.reason_code.isupper()
        assert str(err).startswith(path.name)
        return None
    numbers = raw.cells[ROW].to_list() + [row for row, _reason, _text in raw.malformed]
    assert sorted(numbers) == list(range(1, len(numbers) + 1))  # every record once, none lost
    assert parsed.values.height == raw.cells.height
    assert parsed.values[ROW].to_list() == raw.cells[ROW].to_list()
    assert REASON in parsed.values.columns
    return len(numbers)


@FUZZ
@given(data=st.binary(max_size=3000), delimiter=st.sampled_from(DELIMITERS))
def test_parser_on_random_bytes_rejects_or_accounts_for_every_record(data: bytes, delimiter: str) -> None:
    with scratch() as folder:
        (folder / "profile.toml").write_text(profile_text(delimiter, "."), encoding="utf-8")
        path = folder / "random.csv"
        path.write_bytes(data)
        check_parse(path, load_profile(folder / "profile.toml"))


@FUZZ
@given(export=exports())
def test_parser_on_mangled_exports_rejects_or_accounts_for_every_record(export: tuple[bytes, str, str]) -> None:
    data, delimiter, decimal_mark = export
    with scratch() as folder:
        (folder / "profile.toml").write_text(profile_text(delimiter, decimal_mark), encoding="utf-8")
        path = folder / "mangled.csv"
        path.write_bytes(data)
        check_parse(path, load_profile(folder / "profile.toml"))


@pytest.fixture(scope="module")
def fuzz_store() -> Iterator[Any]:
    with scratch() as folder:
        con = open_store(folder / "fuzz.duckdb")
        yield con
        con.close()


@settings(max_examples=25, deadline=None, suppress_health_check=list(HealthCheck))
@given(export=exports())
def test_load_of_mangled_exports_ends_in_records_quarantine_or_rejection(fuzz_store, export) -> None:
    """The whole load (staging, unit checks, contract, classification, merge) in a store."""
    data, delimiter, decimal_mark = export
    con = fuzz_store
    with scratch() as folder:
        (folder / "profile.toml").write_text(profile_text(delimiter, decimal_mark), encoding="utf-8")
        path = folder / "mangled.csv"
        path.write_bytes(data)
        outcome = ingest_file(con, path, load_profile(folder / "profile.toml"), "fuzz", KEY)
    assert outcome.balanced, outcome
    if outcome.outcome == "rejected":
        assert outcome.reason_code and outcome.message
        return
    if outcome.outcome == "loaded":
        quarantined = con.execute("select count(*) from quarantine where file_sha256 = ?", [outcome.sha256])
        assert quarantined.fetchall()[0][0] == outcome.rows_quarantined


# --------------------------------------------------------------------------------------
# The profile loader
# --------------------------------------------------------------------------------------

PROFILE_KEYS = [
    "name", "format", "delimiter", "quote_char", "decimal_mark", "encoding", "datetime_format", "date_format",
    "timezone", "true_values", "false_values", "missing_values",
    "sample_id", "patient_id", "collected_at", "pao2_mmhg", "paco2_mmhg", "fio2", "ph", "sample_type", "o2_device",
    "temperature_c", "arterial", "A", "RA", "room_air",
]  # fmt: skip
SECTION_KEYS = {
    "codes": ["sample_type", "o2_device"],
    "columns": ["sample_id", "collected_at", "pao2_mmhg", "fio2", "sample_type", "o2_device", "no_such_field"],
    "units": ["pao2_mmhg", "paco2_mmhg", "fio2", "temperature_c", "ph"],
    "unit_columns": ["pao2_mmhg", "paco2_mmhg", "ph"],
}
SECTIONS = ["profile", "columns", "units", "unit_columns", "codes", "codes.sample_type", "codes.o2_device"]
scalars = st.one_of(
    st.sampled_from(["", ",", ";", "\\t", ".", "mmHg", "kPa", "fraction", "percent", "utf-8", "latin1", "csv",
                     "parquet", "UTC", "Europe/London", "Mars/Olympus", "%Y-%m-%d %H:%M", "arterial", "room_air"]),
    st.text(alphabet=st.characters(exclude_categories=("Cs",)), max_size=8),
    st.integers(-(2**63), 2**63 - 1),
    st.floats(allow_nan=False, allow_infinity=False),
    st.booleans(),
)  # fmt: skip
toml_values = st.recursive(
    scalars,
    lambda inner: st.lists(inner, max_size=3) | st.dictionaries(st.sampled_from(PROFILE_KEYS), inner, max_size=3),
    max_leaves=6,
)


def toml_literal(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int | float):
        return repr(value) if isinstance(value, int) else json.dumps(value)
    if isinstance(value, str):
        return json.dumps(value, ensure_ascii=False)
    if isinstance(value, list):
        return "[" + ", ".join(toml_literal(v) for v in value) + "]"
    return "{" + ", ".join(f"{json.dumps(k)} = {toml_literal(v)}" for k, v in value.items()) + "}"


def _sections(text: str) -> list[tuple[str, list[str]]]:
    """(table header, its lines) of a TOML text; the first header is '' (lines before any table)."""
    sections: list[tuple[str, list[str]]] = [("", [])]
    for line in text.splitlines():
        if line.startswith("["):
            sections.append((line.strip("[] "), []))
        elif line.strip() and not line.startswith("#"):
            sections[-1][1].append(line)
    return sections


@st.composite
def profile_documents(draw: st.DrawFn) -> str:
    """The test profile with tables dropped or turned into values, lines dropped, values
    replaced and tables added."""
    out = []
    present = set()
    preamble: list[str] = []  # top-level keys must come before the first table
    as_values: dict[str, list[str]] = {}  # [a.b] turned into "b = <value>" under [a]
    for name, lines in _sections(MINIMAL):
        roll = draw(st.integers(0, 6)) if name else 6
        if roll == 0:
            continue  # drop the whole table
        if roll == 1:  # the table becomes a value of some other type
            parent, _, leaf = name.rpartition(".")
            line = f"{json.dumps(leaf)} = {toml_literal(draw(toml_values))}"
            (as_values.setdefault(parent, []) if parent else preamble).append(line)
            continue
        body = []
        for line in lines:
            roll = draw(st.integers(0, 9))
            if roll == 0:
                continue  # drop the line
            if roll == 1:
                line = f"{line.split('=', 1)[0].strip()} = {toml_literal(draw(toml_values))}"
            body.append(line)
        if name:
            present.add(name)
            out.append(f"[{name}]")
        out += body
    for parent, lines in as_values.items():
        out += [f"[{parent}]", *lines]
        present.add(parent)
    for name in draw(st.lists(st.sampled_from(SECTIONS), max_size=2, unique=True)):
        if name in present:
            continue  # TOML forbids defining a table twice; that case is the parser's, tested by random bytes
        keys = st.sampled_from(SECTION_KEYS.get(name, PROFILE_KEYS)) | st.sampled_from(PROFILE_KEYS)
        body = draw(st.dictionaries(keys, toml_values, min_size=1, max_size=4))
        out.append(f"[{name}]")
        out += [f"{json.dumps(k)} = {toml_literal(v)}" for k, v in body.items()]
    return "\n".join(preamble + out) + "\n"


def check_profile(path: Path) -> None:
    try:
        profile = load_profile(path)
    except ConfigError as err:
        assert str(err).startswith(str(path))
        return
    assert len(profile.delimiter) == 1 and profile.decimal_mark in (".", ",")
    assert {"sample_id", "collected_at"} <= set(profile.columns)


@FUZZ
@given(document=profile_documents())
def test_profile_loader_on_mangled_profiles_loads_or_says_what_is_wrong(document: str) -> None:
    with scratch() as folder:
        path = folder / "profile.toml"
        path.write_text(document, encoding="utf-8")
        check_profile(path)


@settings(max_examples=100, deadline=None)
@given(data=st.binary(max_size=500))
def test_profile_loader_on_random_bytes(data: bytes) -> None:
    with scratch() as folder:
        path = folder / "profile.toml"
        path.write_bytes(data)
        check_profile(path)


# --------------------------------------------------------------------------------------
# Parsing in SQL against the Python parser, cell by cell
# --------------------------------------------------------------------------------------

NUMBER_LIKE = st.one_of(
    st.from_regex(r"-?[0-9]{1,4}(\.[0-9]{1,6})?", fullmatch=True),
    st.from_regex(r"[+-]?[0-9]{0,3}[.,]?[0-9]{0,3}([eE][+-]?[0-9]{1,3})?", fullmatch=True),
    st.sampled_from(["7.40", "007.40", "-0", "-0.0", "1" * 40, "9" * 400, " 7.4", "7.4 ", "\u00a07.4", ">600",
                     "< 5", "haemolysed", "NA", "n/a", "-", "--", "NULL", "None", "", "inf", "NaN", "1e309"]),
)  # fmt: skip
DATE_LIKE = st.one_of(
    st.builds(
        lambda d, h, m: f"2026-{d[0]:02d}-{d[1]:02d} {h:02d}:{m:02d}",
        st.sampled_from([(3, 2), (3, 29), (10, 25), (12, 31), (2, 29), (6, 15)]),
        st.integers(0, 24),
        st.integers(0, 60),
    ),
    st.sampled_from(["2026-3-2 10:00", "2026-03-02 10:00:00", "02/03/2026 10:00", " 2026-03-02 10:00", "yesterday"]),
)
CODE_LIKE = st.sampled_from(["A", "a", " A", "V", "Z", "", "n/a", "RA", "ra", "NC", "JET", "RA "])
TEXT_LIKE = st.one_of(st.sampled_from(["W1", " W1", "W1\t", "Station Süd", "NA", "", "\u3000x"]), cells)


@st.composite
def typed_rows(draw: st.DrawFn) -> str:
    rows = []
    for n in range(draw(st.integers(1, 12))):
        rows.append([
            draw(st.sampled_from([f"S{n}", f"S{n % 3}", "", " S1"])), draw(TEXT_LIKE), draw(TEXT_LIKE),
            draw(DATE_LIKE), draw(DATE_LIKE), draw(CODE_LIKE), draw(CODE_LIKE),
            *[draw(NUMBER_LIKE) for _ in range(5)],
        ])  # fmt: skip
    return render([SOURCE_COLUMNS, *rows], ",", False, "\n") + "\n"


STORE_TABLES = {
    "records": "select * exclude (run_id) from records order by sample_id",
    "quarantine": "select * exclude (run_id) from quarantine order by source_row",
    "record_value_notes": "select * from record_value_notes order by sample_id, field",
    "superseded_records": "select * exclude (run_id) from superseded_records order by source_row",
}


@settings(max_examples=25, deadline=None, suppress_health_check=list(HealthCheck))
@given(content=typed_rows())
def test_sql_parsing_agrees_with_the_python_parser_cell_by_cell(content: str) -> None:
    """Every cell either parsed in SQL to exactly what the Python parser gives, or was
    handed to the Python parser: the two loads leave the same store (Europe/London
    profile, so DST edges are drawn too)."""
    import pipeline.ingest.load as load_module

    outcomes, tables = [], []
    with scratch() as folder:
        path = folder / "export.csv"
        path.write_text(content, encoding="utf-8")
        profile = load_profile(FIXTURES / "profiles" / "minimal.toml")
        for parser in ("python", "sql"):
            previous = load_module.PARSER
            load_module.PARSER = parser
            con = open_store(folder / f"{parser}.duckdb")
            try:
                outcome = ingest_file(con, path, profile, "fuzz", KEY)
                outcomes.append((outcome.outcome, outcome.reason_code, outcome.message, outcome.rows_in,
                                 outcome.rows_loaded, outcome.rows_quarantined, outcome.rows_duplicate))  # fmt: skip
                tables.append({name: con.execute(sql).fetchall() for name, sql in STORE_TABLES.items()})
            finally:
                con.close()
                load_module.PARSER = previous
    assert outcomes[0] == outcomes[1]
    assert tables[0] == tables[1]
