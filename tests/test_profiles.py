"""The rig file and venue profiles: examples, round trips, comments, errors, names, the store."""

from __future__ import annotations

import difflib
import errno
import os
import shutil
import subprocess
import uuid
from collections.abc import Iterator
from datetime import datetime, timedelta, timezone
from pathlib import Path

import pytest

from bridge.calibrate import resolution_report
from bridge.errors import ConfigError
from bridge.profiles import (
    ENV_HOME,
    NAME_MAX,
    SYSTEM_HOME,
    BaselineOverrides,
    Rig,
    Store,
    VenueProfile,
    VoiceOverrides,
    apply_venue,
    check_name,
    differences,
    load_rig,
    load_venue,
    save_rig,
    save_venue,
    store_root,
    venue_problems,
)
from bridge.storage import backup_path

EXAMPLES = Path(__file__).resolve().parent.parent / "profiles"
EXAMPLE_RIG = EXAMPLES / "rig.toml"
EXAMPLE_VENUES = sorted((EXAMPLES / "venues").glob("*.toml"))
EXAMPLE_FILES = [EXAMPLE_RIG, *EXAMPLE_VENUES]


def _load_any(path: Path) -> Rig | VenueProfile:
    return load_rig(path) if path.name == "rig.toml" else load_venue(path)


def _save_any(path: Path, model: Rig | VenueProfile, **kw: bool) -> bool:
    if isinstance(model, Rig):
        return save_rig(path, model, **kw)
    return save_venue(path, model, **kw)


@pytest.fixture
def store(tmp_path: Path) -> Store:
    """A store holding copies of the example rig and venues."""
    root = tmp_path / "store"
    (root / "venues").mkdir(parents=True)
    shutil.copy(EXAMPLE_RIG, root / "rig.toml")
    for p in EXAMPLE_VENUES:
        shutil.copy(p, root / "venues" / p.name)
    return Store(root)


def _snapshot(folder: Path) -> dict[str, bytes]:
    return {
        str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()
    }


def _changed_lines(before: str, after: str) -> list[str]:
    return [
        line
        for line in difflib.unified_diff(before.splitlines(), after.splitlines(), lineterm="", n=0)
        if line[:1] in "+-" and not line.startswith(("+++", "---"))
    ]


# --- the example files ---------------------------------------------------------------------


def test_there_are_examples_of_both_kinds() -> None:
    assert EXAMPLE_RIG.is_file()
    assert len(EXAMPLE_VENUES) >= 2


@pytest.mark.parametrize("path", EXAMPLE_FILES, ids=lambda p: p.name)
def test_example_round_trip_fresh_file(path: Path, tmp_path: Path) -> None:
    """load -> model -> save (a new file, no comments) -> load gives an equal model."""
    model = _load_any(path)
    out = tmp_path / path.name
    assert _save_any(out, model, keep_comments=False) is True
    again = _load_any(out)
    assert again == model
    assert differences(model, again) == []


@pytest.mark.parametrize("path", EXAMPLE_FILES, ids=lambda p: p.name)
def test_example_saved_unchanged_is_not_rewritten(path: Path, tmp_path: Path) -> None:
    """Saving what was loaded leaves the file byte for byte as it was, and unwritten."""
    copy = tmp_path / path.name
    shutil.copy(path, copy)
    before = copy.stat()
    assert _save_any(copy, _load_any(copy)) is False
    after = copy.stat()
    assert copy.read_bytes() == path.read_bytes()
    assert (after.st_ino, after.st_mtime_ns) == (before.st_ino, before.st_mtime_ns)
    assert not backup_path(copy).exists()


@pytest.mark.parametrize("path", EXAMPLE_FILES, ids=lambda p: p.name)
def test_files_we_write_read_the_same_with_the_standard_toml_parser(
    path: Path, tmp_path: Path
) -> None:
    """A general-purpose reference parser (the standard library's tomllib, TOML 1.0.0)
    reads our fresh output to the same data as the example it came from."""
    tomllib = pytest.importorskip("tomllib")  # Python 3.11+
    out = tmp_path / path.name
    _save_any(out, _load_any(path), keep_comments=False)
    model = _load_any(path)
    cls = type(model)
    for text in (out.read_text(encoding="utf-8"), path.read_text(encoding="utf-8")):
        data = tomllib.loads(text)
        assert data.pop("schema") == 1
        assert data.pop("kind") == ("rig" if cls is Rig else "venue")
        assert cls.model_validate(data) == model


def test_example_venues_fit_the_example_rig(store: Store) -> None:
    rig = store.load_rig()
    for name in store.venue_names():
        venue = store.load_venue(name)
        assert venue_problems(rig, venue) == []
        played = apply_venue(rig, venue)
        assert [v.name for v in played.voices] == [v.name for v in rig.voices]
        for ch in rig.channels:
            if ch.role in ("pitch", "volume"):
                assert venue.channels[ch.name].kind == ch.kind


def test_example_overrides_change_only_what_they_name(store: Store) -> None:
    rig = store.load_rig()
    chapel = store.load_venue("saltmarsh-chapel")
    played = apply_venue(rig, chapel)
    pitch, base = played.voices[0].pitch, rig.voices[0].pitch
    assert (pitch.span_semitones, pitch.scale, pitch.root) == (24.0, "dorian", "A")
    assert pitch.a4_hz == base.a4_hz and pitch.higher_when_near == base.higher_when_near
    assert played.baseline.threshold_sigma == 7.0
    assert played.baseline.hysteresis_sigma == rig.baseline.hysteresis_sigma
    assert played.voices[0].level == rig.voices[0].level
    assert rig.voices[0].pitch.span_semitones == 36.0  # the rig itself is untouched


def test_example_calibrations_are_plausible_for_the_simulator(store: Store) -> None:
    """A few percent of oscillator change across the playing range (DOMAIN.md section 1,
    common practice), as the simulator's default hand produces (bridge/sim.py: about 4.6 %)."""
    rig = store.load_rig()
    for name in store.venue_names():
        venue = store.load_venue(name)
        for ch, cal in venue.channels.items():
            rep = resolution_report(cal, window_s=rig.board.window_s)
            assert 2.0 < rep.total_change_pct < 6.0, (name, ch, rep.total_change_pct)
            # period boards: P0 = period_scale * clock / f (bridge/sim.py); 4096 * 48 MHz
            # over the default oscillators (466-513 kHz, 20 pF) is 383,000-422,000 ticks,
            # and a damp or steel-framed room adds up to about 10 % of fixed capacitance.
            assert 370_000 < cal.baseline < 470_000


def test_offset_datetimes_follow_rfc3339(store: Store) -> None:
    # TOML 1.0.0 offset date-times are RFC 3339: 19:10 at +01:00 is 18:10 UTC [std: RFC 3339].
    venue = store.load_venue("ferry-shed")
    assert venue.created.astimezone(timezone.utc) == datetime(
        2025, 6, 13, 18, 10, tzinfo=timezone.utc
    )
    assert venue.created.utcoffset() == timedelta(hours=1)


# --- comments survive the tool's rewrite -----------------------------------------------------


def test_changing_one_value_changes_one_line_and_keeps_comments(store: Store) -> None:
    before = store.rig_path.read_text(encoding="utf-8")
    rig = store.load_rig()
    rig.voices[0].pitch.span_semitones = 30.0
    assert store.save_rig(rig) is True
    after = store.rig_path.read_text(encoding="utf-8")
    assert _changed_lines(before, after) == [
        "-span_semitones = 36.0   # the whole hand travel covers three octaves",
        "+span_semitones = 30.0   # the whole hand travel covers three octaves",
    ]
    assert backup_path(store.rig_path).read_text(encoding="utf-8") == before
    assert store.load_rig().voices[0].pitch.span_semitones == 30.0


def test_new_keys_go_inside_their_table_and_left_out_keys_stay_out(store: Store) -> None:
    before = store.rig_path.read_text(encoding="utf-8")
    rig = store.load_rig()
    rig.baseline.recover_tau_s = 0.5  # a key the file leaves out (commented)
    assert store.save_rig(rig) is True
    after = store.rig_path.read_text(encoding="utf-8")
    assert _changed_lines(before, after) == ["+recover_tau_s = 0.5"]
    lines = after.splitlines()
    # right after the table's last key, not after the next table's introduction
    assert lines[lines.index("recover_tau_s = 0.5") - 1].startswith("follow_tau_s = 5.0")
    assert store.load_rig().baseline.recover_tau_s == 0.5


def test_venue_rewrite_keeps_comments_and_notes(store: Store) -> None:
    path = store.venue_path("tin-lantern")
    comments = [
        ln for ln in path.read_text(encoding="utf-8").splitlines() if ln.lstrip().startswith("#")
    ]
    venue = store.load_venue("tin-lantern")
    venue.voices["lead"] = VoiceOverrides.model_validate({"pitch": {"span_semitones": 30}})
    venue.baseline = BaselineOverrides.model_validate({"threshold_sigma": 5})
    assert store.save_venue("tin-lantern", venue) is True
    text = path.read_text(encoding="utf-8")
    assert all(c in text.splitlines() for c in comments)
    assert "Bar fridge switched off" in text
    again = store.load_venue("tin-lantern")
    assert again == venue
    assert apply_venue(store.load_rig(), again).voices[0].pitch.span_semitones == 30.0


def test_keep_comments_false_writes_a_clean_file(store: Store) -> None:
    venue = store.load_venue("ferry-shed")
    assert store.save_venue("ferry-shed", venue, keep_comments=False) is True
    text = store.venue_path("ferry-shed").read_text(encoding="utf-8")
    assert "steel-framed shed" not in text  # the example's comments are gone
    assert store.load_venue("ferry-shed") == venue


# --- broken files: a named message, nothing changed on disk ----------------------------------


def _refused(path: Path, loader: object = load_rig) -> str:
    folder = path.parent
    before = _snapshot(folder)
    with pytest.raises(ConfigError) as info:
        loader(path)  # type: ignore[operator]
    assert _snapshot(folder) == before  # reading never writes
    return str(info.value)


def test_unparsable_toml_names_file_and_line(store: Store) -> None:
    text = store.rig_path.read_text(encoding="utf-8").replace("[board]", "[board", 1)
    store.rig_path.write_text(text, encoding="utf-8")
    msg = _refused(store.rig_path)
    assert str(store.rig_path) in msg and "not valid TOML" in msg and "line" in msg


def test_invalid_fields_are_named_one_line_each(store: Store) -> None:
    text = store.rig_path.read_text(encoding="utf-8")
    text = text.replace("span_semitones = 36.0", "span_semitones = 120.0\nspan = 3")
    text = text.replace('mode = "slide"', 'mode = "glide"')
    text = text.replace('url = "/dev/serial/by-id/usb-homemade_period_board_0001-if00"\n', "")
    store.rig_path.write_text(text, encoding="utf-8")
    lines = _refused(store.rig_path).splitlines()
    assert len(lines) == 4, lines
    assert all(line.startswith(f"{store.rig_path}: ") for line in lines)
    joined = "\n".join(lines)
    assert (
        "voices[0].pitch.span_semitones: Input should be less than or equal to 96 (found 120.0)"
        in joined
    )
    assert "voices[0].pitch.span: unknown key; allowed here: lowest_note, span_semitones" in joined
    assert "outputs.midi.mode: Input should be 'slide', 'steps' or 'mpe' (found 'glide')" in joined
    assert "source.url: required, but missing" in joined


def test_rig_cross_checks_name_the_field(store: Store) -> None:
    text = store.rig_path.read_text(encoding="utf-8").replace(
        'pitch_channel = "pitch"', 'pitch_channel = "ref"'
    )
    store.rig_path.write_text(text, encoding="utf-8")
    msg = _refused(store.rig_path)
    assert "voices[0].pitch_channel: channel 'ref' has role 'reference', not 'pitch'" in msg


def test_venue_override_checks_name_the_field(store: Store) -> None:
    path = store.venue_path("saltmarsh-chapel")
    path.write_text(
        path.read_text(encoding="utf-8").replace('root = "A"', 'root = "H"'), encoding="utf-8"
    )
    msg = _refused(path, load_venue)
    assert f"{path}: voices.lead.pitch.root: root must be one of" in msg


@pytest.mark.parametrize(
    ("old", "new", "expected"),
    [
        ("schema = 1 ", "schema = 2 ", "written by a newer fieldbridge"),
        ("schema = 1 ", "schema = 0 ", "older than this version"),
        ("schema = 1 ", "", "schema: missing"),
        ('kind = "rig"', 'kind = "venue"', "kind: must be \"rig\" here (found 'venue')"),
    ],
)
def test_schema_and_kind_are_checked(store: Store, old: str, new: str, expected: str) -> None:
    text = store.rig_path.read_text(encoding="utf-8")
    assert old in text
    store.rig_path.write_text(text.replace(old, new, 1), encoding="utf-8")
    assert expected in _refused(store.rig_path)


def test_a_file_from_a_newer_version_is_not_overwritten(store: Store) -> None:
    rig = store.load_rig()
    text = store.rig_path.read_text(encoding="utf-8").replace("schema = 1 ", "schema = 2 ", 1)
    store.rig_path.write_text(text, encoding="utf-8")
    for keep in (True, False):
        with pytest.raises(ConfigError, match="written by a newer fieldbridge"):
            store.save_rig(rig, keep_comments=keep)
    assert store.rig_path.read_text(encoding="utf-8") == text


def test_an_unreadable_file_is_replaced_and_kept_as_backup(store: Store) -> None:
    path = store.venue_path("tin-lantern")
    venue = store.load_venue("tin-lantern")
    path.write_bytes(b"schema = 1\n[broken")
    assert store.save_venue("tin-lantern", venue) is True
    assert store.load_venue("tin-lantern") == venue
    assert backup_path(path).read_bytes() == b"schema = 1\n[broken"


def test_invalid_value_assigned_in_code_is_not_saved(store: Store) -> None:
    before = _snapshot(store.root)
    rig = store.load_rig()
    rig.voices[0].pitch.span_semitones = 500.0  # the mapping model does not check assignment
    with pytest.raises(ConfigError, match=r"voices\[0\]\.pitch\.span_semitones"):
        store.save_rig(rig)
    assert _snapshot(store.root) == before


# --- names and paths ---------------------------------------------------------------------------


HOSTILE = [
    "../x",
    "../../etc/passwd",
    "/etc/passwd",
    "a/b",
    "a\\b",
    "C:\\temp\\x",
    "..",
    ".",
    "...",
    ".hidden",
    "",
    "x" * (NAME_MAX + 1),
    "a\x00b",
    "a..b",
    "name with space",
    "tab\tname",
    "new\nline",
    "caf\u00e9",
    "\u212aelvin",
    "-dash-first",
    "_under",
    "con",
    "NUL.txt",
    "lpt1",
    "~user",
    "$HOME",
    "*",
]


@pytest.mark.parametrize("name", HOSTILE, ids=repr)
def test_hostile_names_are_refused_everywhere(store: Store, name: str) -> None:
    before = _snapshot(store.root.parent)
    with pytest.raises(ConfigError):
        check_name(name)
    with pytest.raises(ConfigError):
        store.venue_path(name)
    with pytest.raises(ConfigError):
        store.load_venue(name)
    with pytest.raises(ConfigError):
        store.save_venue(name, store.load_venue("tin-lantern"))
    with pytest.raises(ConfigError):
        store.activate(name)
    assert _snapshot(store.root.parent) == before


def test_names_that_are_not_text_are_refused() -> None:
    for bad in (None, b"tin-lantern", 7):
        with pytest.raises(ConfigError, match="must be text"):
            check_name(bad)


@pytest.mark.parametrize(
    ("name", "folded"),
    [
        ("tin-lantern", "tin-lantern"),
        ("Tin-Lantern", "tin-lantern"),
        ("a", "a"),
        ("v1.2_b", "v1.2_b"),
        ("9th-street", "9th-street"),
        ("x" * NAME_MAX, "x" * NAME_MAX),
    ],
)
def test_safe_names_are_accepted_and_folded(name: str, folded: str) -> None:
    assert check_name(name) == folded


def test_a_link_out_of_the_store_is_refused(store: Store, tmp_path: Path) -> None:
    outside = tmp_path / "outside.toml"
    shutil.copy(store.venue_path("tin-lantern"), outside)
    (store.venues_dir / "escape.toml").symlink_to(outside)
    original = outside.read_bytes()
    with pytest.raises(ConfigError, match="outside"):
        store.load_venue("escape")
    venue = store.load_venue("tin-lantern")
    venue.notes = "changed"
    with pytest.raises(ConfigError, match="outside"):
        store.save_venue("escape", venue)
    assert outside.read_bytes() == original


# --- where the store lives ---------------------------------------------------------------------


def test_store_root_lookup_order(tmp_path: Path) -> None:
    env = {ENV_HOME: str(tmp_path / "from-env")}
    assert store_root(tmp_path / "opt", environ=env) == tmp_path / "opt"  # 1. option
    assert store_root(None, environ=env) == tmp_path / "from-env"  # 2. environment
    assert store_root(None, environ=env, system=True) == tmp_path / "from-env"
    user = store_root(None, environ={})  # 3. per-user data folder
    assert user.name == "fieldbridge" and user != SYSTEM_HOME
    assert store_root(None, environ={}, system=True) == Path("/var/lib/fieldbridge")  # 4.
    assert store_root(None, environ={ENV_HOME: "  "}) == user  # blank counts as unset


def test_store_root_from_the_real_environment(
    monkeypatch: pytest.MonkeyPatch, store: Store
) -> None:
    monkeypatch.setenv(ENV_HOME, str(store.root))
    located = Store.locate()
    assert located.root == store.root
    assert located.load_rig() == store.load_rig()
    assert located.venue_names() == ["ferry-shed", "saltmarsh-chapel", "tin-lantern"]


# --- the store: active venue, listing, comparing -----------------------------------------------


def test_activate_persists_and_refuses_invalid_profiles(store: Store) -> None:
    assert store.active is None
    store.activate("tin-lantern")
    assert store.active == "tin-lantern"
    assert store.active_path.read_text(encoding="utf-8") == "tin-lantern\n"

    # a profile that lacks the volume channel's calibration does not fit the rig
    broken = store.load_venue("ferry-shed")
    del broken.channels["volume"]
    store.save_venue("half-done", broken)
    marker = store.active_path.read_bytes()
    with pytest.raises(ConfigError) as info:
        store.activate("half-done")
    msg = str(info.value)
    assert "'tin-lantern' stays active" in msg
    assert "channels.volume: no calibration for the volume channel" in msg
    assert store.active_path.read_bytes() == marker

    # a file that does not parse is refused the same way
    store.venue_path("garbled").write_text(
        'schema = 1\nkind = "venue"\n[channels\n', encoding="utf-8"
    )
    with pytest.raises(ConfigError, match="not valid TOML"):
        store.activate("garbled")
    with pytest.raises(ConfigError, match="no venue profile"):
        store.activate("nowhere")
    assert store.active == "tin-lantern"

    store.activate("Saltmarsh-Chapel")
    assert store.active == "saltmarsh-chapel"


def test_list_venues_summarises_each_profile(store: Store) -> None:
    store.activate("ferry-shed")
    store.venue_path("garbled").write_text("schema = 1\n[", encoding="utf-8")
    rows = {s.name: s for s in store.list_venues()}
    assert sorted(rows) == ["ferry-shed", "garbled", "saltmarsh-chapel", "tin-lantern"]
    assert [n for n, s in rows.items() if s.active] == ["ferry-shed"]
    assert rows["garbled"].problem and "not valid TOML" in rows["garbled"].problem
    assert rows["garbled"].quality.startswith("unusable")
    lantern = rows["tin-lantern"]
    assert lantern.problem is None and lantern.created == datetime(
        2025, 2, 7, 18, 30, tzinfo=timezone.utc
    )
    # The figures are the calibration's own resolution report, with the voice's span.
    rig = store.load_rig()
    venue = store.load_venue("tin-lantern")
    span = rig.voices[0].pitch.span_semitones
    rep = {
        ch: resolution_report(cal, window_s=rig.board.window_s, pitch_span_semitones=span)
        for ch, cal in venue.channels.items()
    }
    assert lantern.range_pct == pytest.approx(min(r.total_change_pct for r in rep.values()))
    assert lantern.worst_cents_per_count == pytest.approx(rep["pitch"].cents_per_count_far)
    assert "cents/tick" in lantern.quality and "range" in lantern.quality
    # the chapel's two-octave override gives finer steps than the three octaves elsewhere
    chapel = rows["saltmarsh-chapel"]
    assert chapel.worst_cents_per_count is not None and lantern.worst_cents_per_count is not None
    assert chapel.worst_cents_per_count < lantern.worst_cents_per_count


def test_listing_skips_odd_file_names_and_reports_links_out(store: Store, tmp_path: Path) -> None:
    shutil.copy(store.venue_path("tin-lantern"), store.venues_dir / "Upper-Case.toml")
    shutil.copy(store.venue_path("tin-lantern"), store.venues_dir / "with space.toml")
    (store.venues_dir / "escape.toml").symlink_to(tmp_path / "elsewhere.toml")
    rows = {s.name: s for s in store.list_venues()}
    assert sorted(rows) == ["escape", "ferry-shed", "saltmarsh-chapel", "tin-lantern"]
    assert rows["escape"].problem is not None and "outside" in rows["escape"].problem


def test_compare_reports_field_paths(store: Store) -> None:
    assert store.compare("tin-lantern", "tin-lantern") == []
    diffs = {d.path: d for d in store.compare("tin-lantern", "saltmarsh-chapel")}
    assert diffs["channels.pitch.baseline"].a == pytest.approx(383441.1)
    assert diffs["channels.pitch.baseline"].b == pytest.approx(398823.5)
    assert "voices.lead.pitch.span_semitones" in diffs
    assert repr(diffs["voices.lead.pitch.span_semitones"].a) == "(absent)"
    assert "channels.pitch.points[4].c" in diffs  # the chapel captured six points, not four
    assert "channels.pitch.kind" not in diffs


# --- writing safely --------------------------------------------------------------------------


def test_saving_keeps_a_backup_and_skips_identical_content(store: Store) -> None:
    path = store.venue_path("tin-lantern")
    original = path.read_bytes()
    venue = store.load_venue("tin-lantern")
    assert store.save_venue("tin-lantern", venue) is False
    assert not backup_path(path).exists()
    venue.notes = "second visit"
    assert store.save_venue("tin-lantern", venue) is True
    assert backup_path(path).read_bytes() == original
    assert store.save_venue("tin-lantern", venue) is False  # unchanged now: no write
    assert backup_path(path).read_bytes() == original
    assert [p.name for p in store.venues_dir.iterdir() if p.name.startswith(".")] == []


@pytest.fixture
def tiny_store(tmp_path: Path) -> Iterator[Store]:
    """A store on a real 64 KiB tmpfs, so that a full disk is a real ENOSPC."""
    mnt = tmp_path / "tiny"
    mnt.mkdir()
    res = subprocess.run(
        ["mount", "-t", "tmpfs", "-o", "size=64k", f"fb{uuid.uuid4().hex[:8]}", str(mnt)],
        capture_output=True,
        text=True,
        check=False,
    )
    if res.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here: {res.stderr.strip()}")
    try:
        yield Store(mnt)
    finally:
        subprocess.run(["umount", str(mnt)], check=False)


def test_full_disk_leaves_the_profile_and_active_marker_intact(tiny_store: Store) -> None:
    store = tiny_store
    shutil.copy(EXAMPLE_RIG, store.rig_path)
    venue = load_venue(EXAMPLES / "venues" / "tin-lantern.toml")
    store.save_venue("tin-lantern", venue)
    store.activate("tin-lantern")
    before = _snapshot(store.root)
    # fill the file system to the last byte
    fd = os.open(store.root / "filler", os.O_WRONLY | os.O_CREAT, 0o600)
    try:
        with pytest.raises(OSError) as full:
            while True:
                os.write(fd, b"\0" * 4096)
        assert full.value.errno == errno.ENOSPC
    finally:
        os.close(fd)
    venue.notes = "a long note " * 400
    with pytest.raises(ConfigError, match="disk is full") as info:
        store.save_venue("tin-lantern", venue)
    assert "previous version is unchanged" in str(info.value)
    after = _snapshot(store.root)
    after.pop("filler")
    assert after == before
    assert (
        store.load_venue("tin-lantern").notes
        == load_venue(EXAMPLES / "venues" / "tin-lantern.toml").notes
    )


# --- a soundcheck on the simulator, saved and played -----------------------------------------


def test_a_simulated_soundcheck_saves_and_reloads(store: Store) -> None:
    from bridge.soundcheck import fit_rig, simulated_holds

    rig = store.load_rig()
    assert rig.sim is not None
    holds = simulated_holds(rig.sim, [c.name for c in rig.channels], seed=5, marks=(0.25,))
    cal = fit_rig(rig.channels, holds, rate_hz=rig.board.rate_hz)
    venue = VenueProfile.from_calibration(cal, notes="first night\nsecond line")
    assert store.save_venue("new-room", venue) is True
    again = store.load_venue("new-room")
    assert again == venue
    assert again.calibration().channels.keys() == cal.channels.keys()
    assert again.calibration().reference_base == cal.reference_base
    assert venue_problems(rig, again) == []
    # multi-line notes are written as a readable multi-line string
    assert 'notes = """first night\nsecond line"""' in store.venue_path("new-room").read_text(
        encoding="utf-8"
    )
