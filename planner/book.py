"""The book of sold deals: an SQLite database of committed deals and the spots they hold.

A committed deal holds whole spots of sellable units (zone x network x daypart x week); every
later check or plan sees the inventory's avails less the spots held. The book lives in
`<scenario>/book.sqlite` unless another path is given. A committed mid-flight rebalance also
stores the posted actuals it used (`postings`), so the stress test can value the deal's remaining
weeks on the same updated forecast.

Safety properties (what the design rests on):

- Check-and-hold is one write transaction (`BEGIN IMMEDIATE` takes SQLite's write lock before
  the holds are re-read), so two desks committing at once can never hold more spots of a unit
  than its avails: the second desk waits for the lock, then sees the first desk's holds.
- The database runs in WAL mode with `synchronous=FULL`; a process killed in the middle of a
  commit leaves the book exactly as before the commit (the transaction never reached COMMIT) or
  exactly after it.
- The schema is versioned (`schema_version` table); upgrades are applied, in one transaction,
  when a book is opened.

Books are read without being created: reading a book that does not exist yet gives an empty book.

The book is a store: it plans nothing. `commit_plan` takes the planner that makes (and, under the
lock, re-makes) the plan from its caller (`planner.workflows.commit_deal`).
"""
from __future__ import annotations

import contextlib
import getpass
import json
import os
import sqlite3
import tempfile
import time
import urllib.parse
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable, Iterable, Iterator

import numpy as np
import pandas as pd

from planner.atomic import ordinary_mode
from planner.errors import InputError
from planner.scenario import Deal, Mix
from planner.terms import Terms, terms_from_dict

BOOK_FILENAME = "book.sqlite"
UNIT_KEY = ["zone", "network", "daypart", "week"]
HELD_COLUMNS = UNIT_KEY + ["spots"]
HOLD_COLUMNS = UNIT_KEY + ["spots", "rate", "cost", "expected_impressions", "sd"]
POSTING_COLUMNS = UNIT_KEY + ["spots_aired", "impressions"]

# Test hook: seconds to sleep inside the commit transaction, after the holds are written and
# before COMMIT (lets a test kill a process in the middle of a commit).
_SLEEP_ENV = "PLEDGE_BOOK_SLEEP_IN_COMMIT"
_BUSY_TIMEOUT_MS = 60_000

# Schema upgrades: (version, statements). Version n is reached by applying every entry <= n in
# order. Never edit an entry once released; add a new one.
_MIGRATIONS: list[tuple[int, list[str]]] = [
    (1, [
        """CREATE TABLE deals (
            name TEXT PRIMARY KEY,
            advertiser TEXT,
            demo TEXT NOT NULL,
            guarantee REAL NOT NULL,
            price_cpm REAL NOT NULL,
            confidence REAL,
            pad REAL,
            first_week INTEGER NOT NULL,
            last_week INTEGER NOT NULL,
            committed_at TEXT NOT NULL,
            expected_impressions REAL,
            sd REAL,
            probability REAL,
            cost REAL,
            spots INTEGER,
            summary_json TEXT
        )""",
        """CREATE TABLE holds (
            deal TEXT NOT NULL REFERENCES deals(name) ON DELETE CASCADE,
            zone TEXT NOT NULL,
            network TEXT NOT NULL,
            daypart TEXT NOT NULL,
            week INTEGER NOT NULL,
            spots INTEGER NOT NULL CHECK (spots > 0),
            rate REAL,
            cost REAL,
            expected_impressions REAL,
            sd REAL,
            PRIMARY KEY (deal, zone, network, daypart, week)
        )""",
        "CREATE INDEX holds_unit ON holds (zone, network, daypart, week)",
    ]),
    (2, [
        # An append-only log of what was done to the book (commit, release, rebalance).
        """CREATE TABLE events (
            id INTEGER PRIMARY KEY AUTOINCREMENT,
            at TEXT NOT NULL,
            deal TEXT NOT NULL,
            action TEXT NOT NULL,
            detail_json TEXT
        )""",
        "ALTER TABLE deals ADD COLUMN scenario_name TEXT",
    ]),
    (3, [
        # The posted actuals a committed rebalance used (the evidence behind its forecast update),
        # one row per posted unit-week; the stress test folds them into the deal's forecast rows.
        """CREATE TABLE postings (
            deal TEXT NOT NULL REFERENCES deals(name) ON DELETE CASCADE,
            zone TEXT NOT NULL,
            network TEXT NOT NULL,
            daypart TEXT NOT NULL,
            week INTEGER NOT NULL,
            spots_aired INTEGER NOT NULL CHECK (spots_aired >= 0),
            impressions REAL NOT NULL CHECK (impressions >= 0),
            PRIMARY KEY (deal, zone, network, daypart, week)
        )""",
    ]),
    (4, [
        # The deal's terms as committed (every key of its deal file, mix rules included), so the
        # book answers for a deal whose file changed or went; and who did each thing (audit).
        "ALTER TABLE deals ADD COLUMN terms_json TEXT",
        "ALTER TABLE events ADD COLUMN user TEXT",
    ]),
]
SCHEMA_VERSION = _MIGRATIONS[-1][0]


# --------------------------------------------------------------------------- paths, connections

def book_path(scenario_or_path: Any, book: str | os.PathLike | None = None) -> Path:
    """Path of the book file: `book` if given, else `<scenario folder>/book.sqlite`.

    `scenario_or_path` is a `Scenario` (its `.path`), a scenario folder, or a `.sqlite` file.
    """
    if book is not None:
        return Path(book)
    folder = getattr(scenario_or_path, "path", scenario_or_path)
    folder = Path(folder)
    if folder.suffix in (".sqlite", ".db", ".sqlite3"):
        return folder
    return folder / BOOK_FILENAME


def _now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


def os_user() -> str:
    """The operating-system user running pledge (login name; the numeric uid when there is none)."""
    try:
        return getpass.getuser()
    except (KeyError, OSError):  # no login name in the environment or the password database
        return str(os.getuid()) if hasattr(os, "getuid") else "unknown"


def _connect(path: Path) -> sqlite3.Connection:
    conn = sqlite3.connect(str(path), timeout=_BUSY_TIMEOUT_MS / 1000, isolation_level=None)
    conn.row_factory = sqlite3.Row
    conn.execute(f"PRAGMA busy_timeout = {_BUSY_TIMEOUT_MS}")
    conn.execute("PRAGMA schema_version").fetchone()  # fails here when the file cannot be opened
    mode = conn.execute("PRAGMA journal_mode = WAL").fetchone()[0]
    if str(mode).lower() != "wal":  # pragma: no cover - file systems without shared memory
        conn.execute("PRAGMA journal_mode = DELETE")
    conn.execute("PRAGMA synchronous = FULL")
    conn.execute("PRAGMA foreign_keys = ON")
    return conn


def _schema_version(conn: sqlite3.Connection) -> int:
    row = conn.execute(
        "SELECT name FROM sqlite_master WHERE type='table' AND name='schema_version'").fetchone()
    if row is None:
        return 0
    row = conn.execute("SELECT MAX(version) FROM schema_version").fetchone()
    return int(row[0] or 0)


def _upgrade(conn: sqlite3.Connection, path: Path) -> None:
    """Apply missing schema upgrades in one write transaction (safe against concurrent openers)."""
    if _schema_version(conn) == SCHEMA_VERSION:
        return
    conn.execute("BEGIN IMMEDIATE")
    try:
        version = _schema_version(conn)  # re-read under the write lock
        if version > SCHEMA_VERSION:
            raise InputError(
                f"{path}: book schema version {version} is newer than this pledge understands "
                f"({SCHEMA_VERSION}); upgrade pledge")
        if version == 0:
            conn.execute("CREATE TABLE schema_version (version INTEGER NOT NULL, applied_at TEXT NOT NULL)")
        for target, statements in _MIGRATIONS:
            if target <= version:
                continue
            for sql in statements:
                conn.execute(sql)
            conn.execute("INSERT INTO schema_version (version, applied_at) VALUES (?, ?)", (target, _now()))
        conn.execute("COMMIT")
    except BaseException:
        conn.execute("ROLLBACK")
        raise


def _not_a_book(path: Path) -> None:
    """InputError when `path` is a file that cannot be a book (0 bytes: SQLite would take it for
    an empty database and write a fresh schema into it, so every deal would look easier)."""
    if path.is_file() and path.stat().st_size == 0:
        raise InputError(f"{path}: not a book (an empty file; `pledge book commit` creates a book where there "
                         f"is no file, so remove it or name another --book)")


def _create_book(path: Path) -> None:
    """Make a new book at `path` whole: the schema is written to a file beside it, which is then
    linked into place (a concurrent reader never sees a half-made, 0-byte book). When another
    process made the book meanwhile, its book is kept."""
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, name = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".new", dir=path.parent)
    os.close(fd)
    tmp = Path(name)
    try:
        conn = _connect(tmp)
        try:
            _upgrade(conn, path)
        finally:
            conn.close()
        ordinary_mode(tmp)
        try:
            os.link(tmp, path)
        except FileExistsError:
            pass
        except OSError:  # a file system without hard links
            if not path.exists():
                os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)


def open_book(path: str | os.PathLike, *, create: bool = True) -> sqlite3.Connection:
    """Open (and create or upgrade) the book at `path`; returns an autocommit connection."""
    path = Path(path)
    try:
        if not path.exists():
            if not create:
                raise InputError(f"{path}: no book here (commit a deal first)")
            _create_book(path)
        _not_a_book(path)
        conn = _connect(path)
        _upgrade(conn, path)
    except sqlite3.DatabaseError as exc:
        if _read_only_error(exc):
            raise InputError(f"{path}: the book cannot be written here, the folder or file is read-only "
                             f"({exc})") from exc
        raise InputError(f"{path}: not a readable book ({exc})") from exc
    except PermissionError as exc:
        raise InputError(f"{path}: the book cannot be written here, the folder is read-only ({exc})") from exc
    return conn


def _open_read_only(path: Path) -> sqlite3.Connection:
    """A read-only connection to the book at `path`, for a folder that cannot be written to (the
    WAL index cannot be made there, so the file is opened as immutable: SQLite's URI parameter
    for files nothing else writes while it reads). The book must be of the current schema (an
    upgrade is a write)."""
    uri = f"file:{urllib.parse.quote(str(path.resolve()))}?mode=ro&immutable=1"
    try:
        conn = sqlite3.connect(uri, uri=True, isolation_level=None)
        conn.row_factory = sqlite3.Row
        version = _schema_version(conn)
    except sqlite3.DatabaseError as exc:
        raise InputError(f"{path}: not a readable book ({exc})") from exc
    if version != SCHEMA_VERSION:
        conn.close()
        raise InputError(f"{path}: book schema version {version} needs an upgrade to {SCHEMA_VERSION}, which "
                         f"cannot be written in this read-only folder; open it once where it can be written")
    return conn


def _read_only_error(exc: BaseException | None) -> bool:
    """True for the errors SQLite gives on a book in a folder or file it may not write."""
    text = str(exc).lower()
    return isinstance(exc, sqlite3.OperationalError) and (
        "unable to open" in text or "readonly" in text or "read-only" in text)


@contextlib.contextmanager
def _reader(path: Path) -> Iterator[sqlite3.Connection | None]:
    """A connection for reading, or None when the book file does not exist (an empty book).
    In a folder that cannot be written to, a read-only connection (`_open_read_only`)."""
    if not path.exists():
        yield None
        return
    try:
        conn = open_book(path)
    except InputError as exc:
        if not _read_only_error(exc.__cause__):
            raise
        conn = _open_read_only(path)
    try:
        yield conn
    finally:
        conn.close()


@contextlib.contextmanager
def write_transaction(conn: sqlite3.Connection) -> Iterator[sqlite3.Connection]:
    """`BEGIN IMMEDIATE` ... `COMMIT` (rolled back on any exception): holds the write lock."""
    conn.execute("BEGIN IMMEDIATE")
    try:
        yield conn
    except BaseException:
        conn.execute("ROLLBACK")
        raise
    conn.execute("COMMIT")


# --------------------------------------------------------------------------- reading

def _held_from(conn: sqlite3.Connection | None, exclude: Iterable[str] = ()) -> pd.DataFrame:
    exclude = [exclude] if isinstance(exclude, str) else list(exclude)
    if conn is None:
        return _empty_held()
    sql = "SELECT zone, network, daypart, week, SUM(spots) AS spots FROM holds"
    if exclude:
        sql += f" WHERE deal NOT IN ({','.join('?' * len(exclude))})"
    sql += " GROUP BY zone, network, daypart, week ORDER BY zone, network, daypart, week"
    rows = conn.execute(sql, exclude).fetchall()
    if not rows:
        return _empty_held()
    df = pd.DataFrame([tuple(r) for r in rows], columns=HELD_COLUMNS)
    return df.astype({"week": "int64", "spots": "int64"})


def _empty_held() -> pd.DataFrame:
    return pd.DataFrame({"zone": pd.Series([], dtype=str), "network": pd.Series([], dtype=str),
                         "daypart": pd.Series([], dtype=str), "week": pd.Series([], dtype="int64"),
                         "spots": pd.Series([], dtype="int64")})


def held_spots(scenario_or_path: Any, book: str | os.PathLike | None = None, *,
               exclude: str | Iterable[str] = ()) -> pd.DataFrame:
    """Spots held by committed deals, summed per unit.

    Returns a DataFrame `zone, network, daypart, week, spots` (spots: whole 30-second spots),
    one row per unit with at least one held spot; empty when there is no book. `exclude` names
    deals whose holds are left out (a rebalance re-plans a deal against everyone else's holds).
    """
    with _reader(book_path(scenario_or_path, book)) as conn:
        return _held_from(conn, exclude)


@dataclass
class BookDeal:
    """One committed deal as stored in the book. Money in the scenario currency; impressions."""

    name: str
    advertiser: str | None
    demo: str
    guarantee: float
    price_cpm: float
    confidence: float | None
    pad: float | None
    first_week: int
    last_week: int
    committed_at: str
    expected_impressions: float | None
    sd: float | None
    probability: float | None
    cost: float | None
    spots: int | None
    summary: dict = field(default_factory=dict)
    # the deal's terms as committed (`deal_terms`; {} for a deal committed before schema 4)
    terms: dict = field(default_factory=dict)
    holds: pd.DataFrame | None = None
    # posted actuals stored by a committed rebalance (DataFrame `POSTING_COLUMNS`; empty when
    # none are stored; None when not read)
    postings: pd.DataFrame | None = None

    @property
    def revenue(self) -> float:
        """What the advertiser pays for the guarantee: impressions x CPM / 1000 (currency)."""
        return self.guarantee * self.price_cpm / 1000.0

    def as_dict(self, with_holds: bool = False) -> dict:
        out = {k: getattr(self, k) for k in (
            "name", "advertiser", "demo", "guarantee", "price_cpm", "confidence", "pad",
            "first_week", "last_week", "committed_at", "expected_impressions", "sd",
            "probability", "cost", "spots")}
        out["revenue"] = self.revenue
        out["summary"] = self.summary
        out["terms"] = self.terms
        if with_holds and self.holds is not None:
            out["holds"] = self.holds.to_dict(orient="records")
        return out


def _deal_from_row(row: sqlite3.Row, holds: pd.DataFrame | None = None,
                   postings: pd.DataFrame | None = None) -> BookDeal:
    d = dict(row)
    return BookDeal(
        name=d["name"], advertiser=d["advertiser"], demo=d["demo"], guarantee=d["guarantee"],
        price_cpm=d["price_cpm"], confidence=d["confidence"], pad=d["pad"],
        first_week=d["first_week"], last_week=d["last_week"], committed_at=d["committed_at"],
        expected_impressions=d["expected_impressions"], sd=d["sd"], probability=d["probability"],
        cost=d["cost"], spots=d["spots"], summary=json.loads(d["summary_json"] or "{}"), holds=holds,
        postings=postings, terms=json.loads(d.get("terms_json") or "{}"))


_TEXT_HOLD = ("deal", "zone", "network", "daypart")
_INT_HOLD = ("week", "spots")


_SEP = "\x1f"  # unit separator: never part of a zone, network, daypart or deal name


def _holds_columns(conn: sqlite3.Connection, cols: list[str], where: str, args: tuple) -> dict | None:
    """Text and integer hold columns `cols` as arrays, read in ONE scan as one concatenated string
    per column (text: (codes, sorted uniques); integers: int64). None when a column is of another
    type (REAL would lose digits as text) or a text value holds the separator: the caller then
    reads row by row."""
    if any(c not in _TEXT_HOLD and c not in _INT_HOLD for c in cols):
        return None
    agg = ", ".join(f"group_concat({c}, char(31))" for c in cols)
    row = conn.execute(f"SELECT count(*), {agg} FROM holds{where}", args).fetchone()
    n = int(row[0])
    out = {}
    for c, blob in zip(cols, row[1:]):
        parts = blob.split(_SEP) if n else []
        if len(parts) != n:
            return None
        out[c] = (pd.factorize(np.array(parts, dtype=object), sort=True) if c in _TEXT_HOLD
                  else np.array(parts, dtype=np.int64))
    return out


def _holds_of(conn: sqlite3.Connection, deal: str | None = None, columns: list[str] | None = None) -> pd.DataFrame:
    """Holds (of one deal, or all) as a DataFrame `deal` + `columns` (default HOLD_COLUMNS), ordered
    by deal, week, zone, network, daypart."""
    cols = ["deal"] + list(HOLD_COLUMNS if columns is None else columns)
    where, args = ("", ()) if deal is None else (" WHERE deal = ?", (deal,))
    # Columns come back as one string each from a single scan: on a national book (over a
    # million holds) fetching Python tuples row by row, SQLite's ORDER BY and row-wise frame
    # construction took most of the stress test's set-up time.
    data = _holds_columns(conn, cols, where, args)
    if data is None:  # a name holds the separator: row by row
        cur = conn.cursor()
        cur.row_factory = None
        rows = cur.execute(f"SELECT {', '.join(cols)} FROM holds{where}", args).fetchall()
        data = {}
        for c, col in zip(cols, zip(*rows)):
            data[c] = (pd.factorize(np.asarray(col, dtype=object), sort=True) if c in _TEXT_HOLD
                       else np.array(col, dtype=np.int64 if c in _INT_HOLD else float))
    if not data or len(data["deal"][0]) == 0:
        return _holds_of_empty()[cols]
    # Same order as ORDER BY deal, week, zone, network, daypart (BINARY collation = code-point
    # order, which is the order of the sorted uniques' codes).
    key = {c: (v[0] if c in _TEXT_HOLD else v) for c, v in data.items()}
    order = np.lexsort([key["daypart"], key["network"], key["zone"], key["week"], key["deal"]]
                       if all(c in key for c in ("zone", "network", "daypart", "week")) else [key["deal"]])
    frame = {}
    for c, v in data.items():
        if c in _TEXT_HOLD:
            codes, uniq = v
            # the dtype `astype(str)` gives (pandas' str dtype, or object on older pandas)
            frame[c] = pd.Series(np.asarray(uniq, dtype=object)).astype(str).array.take(codes[order])
        else:
            frame[c] = v[order]
    return pd.DataFrame(frame)


def list_deals(scenario_or_path: Any, book: str | os.PathLike | None = None) -> list[BookDeal]:
    """Committed deals in commit order (without their holds)."""
    with _reader(book_path(scenario_or_path, book)) as conn:
        if conn is None:
            return []
        rows = conn.execute("SELECT * FROM deals ORDER BY committed_at, name").fetchall()
        return [_deal_from_row(r) for r in rows]


def get_deal(scenario_or_path: Any, name: str, book: str | os.PathLike | None = None) -> BookDeal:
    """One committed deal with its holds (DataFrame `HOLD_COLUMNS`); InputError if not in the book."""
    path = book_path(scenario_or_path, book)
    with _reader(path) as conn:
        row = None if conn is None else conn.execute("SELECT * FROM deals WHERE name = ?", (name,)).fetchone()
        if row is None:
            raise InputError(f"{path}: deal {name!r} is not in the book")
        return _deal_from_row(row, _holds_of(conn, name).drop(columns="deal"),
                              _postings_of(conn, name).drop(columns="deal"))


def read_book(scenario_or_path: Any, book: str | os.PathLike | None = None, *,
              hold_columns: list[str] | None = None) -> tuple[list[BookDeal], pd.DataFrame]:
    """Every committed deal and every hold (DataFrame `deal` + `hold_columns`, default
    `HOLD_COLUMNS`) from one snapshot; each deal carries its own holds."""
    with _reader(book_path(scenario_or_path, book)) as conn:
        if conn is None:
            return [], _holds_of_empty()[["deal"] + list(HOLD_COLUMNS if hold_columns is None else hold_columns)]
        conn.execute("BEGIN")  # one consistent read snapshot
        try:
            rows = conn.execute("SELECT * FROM deals ORDER BY committed_at, name").fetchall()
            holds = _holds_of(conn, columns=hold_columns)
            posted = _postings_of(conn)
        finally:
            conn.execute("COMMIT")
        # rows are ordered by deal: each deal's holds are one contiguous slice
        names = holds["deal"].to_numpy()
        bounds = {}
        if len(names):
            cut = np.flatnonzero(names[1:] != names[:-1]) + 1
            starts = np.r_[0, cut]
            ends = np.r_[cut, len(names)]
            bounds = {names[a]: (a, b) for a, b in zip(starts, ends)}
        body = holds.drop(columns="deal")
        by_deal = {name: part.drop(columns="deal").reset_index(drop=True)
                   for name, part in posted.groupby("deal", sort=False)}
        empty = posted.iloc[:0].drop(columns="deal")
        deals = [_deal_from_row(r, body.iloc[slice(*bounds.get(r["name"], (0, 0)))].reset_index(drop=True),
                                by_deal.get(r["name"], empty))
                 for r in rows]
        return deals, holds


def _postings_of(conn: sqlite3.Connection, deal: str | None = None) -> pd.DataFrame:
    """Stored postings (of one deal, or all) as a DataFrame `deal` + `POSTING_COLUMNS`
    (week, spots_aired int64; impressions float), ordered by deal, week, zone, network, daypart."""
    where, args = ("", ()) if deal is None else (" WHERE deal = ?", (deal,))
    rows = conn.execute(f"SELECT deal, {', '.join(POSTING_COLUMNS)} FROM postings{where} "
                        f"ORDER BY deal, week, zone, network, daypart", args).fetchall()
    if not rows:
        return _empty_postings()
    df = pd.DataFrame([tuple(r) for r in rows], columns=["deal"] + POSTING_COLUMNS)
    return df.astype(_POSTING_TYPES)


_POSTING_TYPES = {"deal": str, "zone": str, "network": str, "daypart": str, "week": "int64",
                  "spots_aired": "int64", "impressions": float}


def _empty_postings() -> pd.DataFrame:
    return pd.DataFrame({c: [] for c in ["deal"] + POSTING_COLUMNS}).astype(_POSTING_TYPES)


def read_postings(scenario_or_path: Any, book: str | os.PathLike | None = None, *,
                  deal: str | None = None) -> pd.DataFrame:
    """Posted actuals stored by committed rebalances: DataFrame `deal, zone, network, daypart,
    week, spots_aired, impressions` (whole aired spots; impressions in the deal's demo), one row
    per posted unit-week, of one deal (`deal`) or of every deal; empty when there are none or no
    book. A deal's postings are the ones its latest committed rebalance used."""
    with _reader(book_path(scenario_or_path, book)) as conn:
        return _empty_postings() if conn is None else _postings_of(conn, deal)


def _holds_of_empty() -> pd.DataFrame:
    df = pd.DataFrame({c: [] for c in ["deal"] + HOLD_COLUMNS})
    return df.astype({"deal": str, "zone": str, "network": str, "daypart": str, "week": "int64", "spots": "int64"})


def events(scenario_or_path: Any, book: str | os.PathLike | None = None) -> pd.DataFrame:
    """The book's log, oldest first: `at` (UTC, ISO 8601), `deal`, `action` (commit, release,
    rebalance), `user` (operating-system user; None for events logged before schema 4) and
    `detail` (dict)."""
    cols = ["at", "deal", "action", "user", "detail"]
    with _reader(book_path(scenario_or_path, book)) as conn:
        if conn is None:
            return pd.DataFrame(columns=cols)
        rows = conn.execute("SELECT at, deal, action, user, detail_json FROM events ORDER BY id").fetchall()
        return pd.DataFrame([(r[0], r[1], r[2], r[3], json.loads(r[4] or "{}")) for r in rows], columns=cols)


# --------------------------------------------------------------------------- checks

def over_avails(held: pd.DataFrame, inventory: pd.DataFrame, extra: pd.DataFrame | None = None) -> pd.DataFrame:
    """Units where held (+ extra) spots exceed avails: DataFrame `zone,network,daypart,week,spots,avails`.

    A held unit missing from the inventory counts as 0 avails.
    """
    parts = [held[HELD_COLUMNS]]
    if extra is not None and len(extra):
        parts.append(extra[HELD_COLUMNS])
    total = pd.concat(parts, ignore_index=True)
    if total.empty:
        return total.assign(avails=pd.Series([], dtype="int64"))
    total = total.astype({"week": "int64"}).groupby(UNIT_KEY, as_index=False)["spots"].sum()
    inv = inventory[UNIT_KEY + ["avails"]].astype({"week": "int64"})
    merged = total.merge(inv, on=UNIT_KEY, how="left")
    merged["avails"] = merged["avails"].fillna(0).astype("int64")
    return merged[merged["spots"] > merged["avails"]].reset_index(drop=True)


def over_avails_warning(held: pd.DataFrame, inventory: pd.DataFrame) -> list[str]:
    """One warning when the held spots (summed per unit, `HELD_COLUMNS`) exceed a unit's avails
    (the inventory was cut below existing holds), naming the count of units, the spots over and
    the first unit; [] otherwise."""
    over = over_avails(held, inventory)
    if over.empty:
        return []
    r = over.iloc[0]
    excess = int((over["spots"] - over["avails"]).sum())
    return [f"the book holds more spots than the avails in {len(over):,} unit(s), {excess:,} spot(s) over "
            f"(first: {r.zone}/{r.network}/{r.daypart}/week {int(r.week)}, {int(r.spots)} held, {int(r.avails)} "
            f"avails): the inventory was cut below the holds; release or re-plan a deal (`pledge book check`)"]


def book_warnings(scenario: Any, book: str | os.PathLike | None = None) -> list[str]:
    """Warnings about the book against the scenario's inventory (`over_avails_warning`); [] when
    there is no book."""
    with _reader(book_path(scenario, book)) as conn:
        return over_avails_warning(_held_from(conn), scenario.inventory)


def _plan_spots(plan: Any) -> pd.DataFrame:
    spots = plan.spots.copy()
    spots = spots[spots["spots"] > 0].reset_index(drop=True)
    for c in ("rate", "cost", "expected_impressions", "sd"):
        if c not in spots.columns:
            spots[c] = np.nan
    spots["spots"] = spots["spots"].round().astype("int64")
    spots["week"] = spots["week"].astype("int64")
    return spots[HOLD_COLUMNS]


def _plan_is_deliverable(plan: Any) -> bool:
    for attr in ("deliverable", "feasible", "ok"):
        if hasattr(plan, attr):
            return bool(getattr(plan, attr))
    status = str(getattr(plan, "status", "optimal")).lower()
    return status in ("optimal", "ok", "feasible")


def _plan_reason(plan: Any) -> str:
    for attr in ("reason", "message", "verdict", "status"):
        val = getattr(plan, attr, None)
        if val:
            return str(val)
    return "the plan does not meet the guarantee at the deal's risk margin"


def _plan_summary(plan: Any, spots: pd.DataFrame) -> dict:
    def num(attr: str, default=None):
        val = getattr(plan, attr, default)
        try:
            return None if val is None else float(val)
        except (TypeError, ValueError):
            return None

    cost = num("cost")
    if cost is None:
        cost = float(np.nansum(spots["cost"])) if spots["cost"].notna().any() else None
    exp = num("expected_impressions")
    if exp is None and spots["expected_impressions"].notna().any():
        exp = float(spots["expected_impressions"].sum())
    return {
        "expected_impressions": exp,
        "sd": num("sd"),
        "probability": num("probability"),
        "cost": cost,
        "cost_sd": num("cost_sd"),
        "spots": int(spots["spots"].sum()),
        "margin": num("margin"),
        "solver": getattr(plan, "solver", None),
    }


# --------------------------------------------------------------------------- writing

@dataclass
class CommitResult:
    """The answer to a commit: committed or not, why, and the plan that was held."""

    deal: str
    committed: bool
    book: str
    reason: str = ""
    replanned: bool = False
    summary: dict = field(default_factory=dict)
    plan: Any = None

    def as_dict(self) -> dict:
        return {"deal": self.deal, "committed": self.committed,
                "verdict": "committed" if self.committed else "not committed", "book": self.book,
                "reason": self.reason, "replanned_under_lock": self.replanned, **self.summary}


def _insert_deal(conn: sqlite3.Connection, scenario: Any, deal: Any, spots: pd.DataFrame,
                 summary: dict, action: str = "commit", committed_at: str | None = None) -> None:
    conn.execute(
        """INSERT INTO deals (name, advertiser, demo, guarantee, price_cpm, confidence, pad,
               first_week, last_week, committed_at, expected_impressions, sd, probability, cost,
               spots, summary_json, scenario_name, terms_json)
           VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)""",
        (deal.name, getattr(deal, "advertiser", None), deal.demo, float(deal.impressions),
         float(deal.price_cpm), _opt(getattr(deal, "confidence", None)), _opt(getattr(deal, "pad", None)),
         int(deal.first_week), int(deal.last_week), committed_at or _now(),
         summary.get("expected_impressions"), summary.get("sd"), summary.get("probability"),
         summary.get("cost"), summary.get("spots"), json.dumps(summary, default=str),
         getattr(scenario, "name", None), json.dumps(deal_terms(deal))))
    rows = [(deal.name, r.zone, r.network, r.daypart, int(r.week), int(r.spots), _opt(r.rate),
             _opt(r.cost), _opt(r.expected_impressions), _opt(r.sd))
            for r in spots.itertuples(index=False)]
    conn.executemany(
        """INSERT INTO holds (deal, zone, network, daypart, week, spots, rate, cost,
               expected_impressions, sd) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)""", rows)
    _log(conn, deal.name, action, summary)


def deal_terms(deal: Any) -> dict:
    """A deal's terms as stored with its commit: the deal file's keys (`planner.scenario.Deal`
    without its name and path), mix rules as a dict with lists for the exclusions."""
    mix = getattr(deal, "mix", None)
    rules = {}
    if mix is not None:
        flat = {k: v for k, v in vars(mix).items() if k != "extra"}
        flat.update(getattr(mix, "extra", None) or {})  # further families' keys, as in the deal file
        rules = {k: (list(v) if isinstance(v, tuple) else (dict(v) if isinstance(v, dict) else v))
                 for k, v in flat.items()}
    return {"advertiser": getattr(deal, "advertiser", None), "demo": deal.demo, "impressions": float(deal.impressions),
            "first_week": int(deal.first_week), "last_week": int(deal.last_week),
            "price_cpm": float(deal.price_cpm), "confidence": _opt(getattr(deal, "confidence", None)),
            "pad": _opt(getattr(deal, "pad", None)), "mix": rules,
            "terms": (getattr(deal, "terms", None) or Terms()).as_dict()}


def terms_differ(booked: BookDeal, deal: Any) -> list[str]:
    """How a deal file differs from the terms its deal was committed on: one text per key
    ('impressions: 26,729,000 in the book, 30,000,000 in the file'); [] when the same. A deal
    committed before terms were stored (schema < 4) is compared on the book's columns only."""
    now = deal_terms(deal)
    then = dict(booked.terms) if booked.terms else {
        "advertiser": booked.advertiser, "demo": booked.demo, "impressions": booked.guarantee,
        "first_week": booked.first_week, "last_week": booked.last_week, "price_cpm": booked.price_cpm,
        "confidence": booked.confidence, "pad": booked.pad}
    out = []
    for key, was in then.items():
        new = now.get(key)
        if key in ("mix", "terms"):
            out += [f"{key}.{k}: {was.get(k)!r} in the book, {new.get(k)!r} in the file"
                    for k in sorted(set(was) | set(new)) if was.get(k) != new.get(k)]
        elif was != new:
            fmt = (lambda v: f"{v:,.0f}") if key == "impressions" else repr
            out.append(f"{key}: {fmt(was) if was is not None else None} in the book, "
                       f"{fmt(new) if new is not None else None} in the file")
    return out


def deal_from_book(booked: BookDeal, path: Any = None) -> Any:
    """The `planner.scenario.Deal` a committed deal was committed on (its stored terms; mix rules
    empty and make-good terms the defaults, `planner.terms.Terms()`, for a deal committed before
    they were stored)."""
    t = booked.terms or {}
    m = t.get("mix") or {}
    mix = Mix(max_network_share=m.get("max_network_share"), daypart_min_share=dict(m.get("daypart_min_share") or {}),
              daypart_max_share=dict(m.get("daypart_max_share") or {}),
              exclude_networks=tuple(m.get("exclude_networks") or ()), exclude_zones=tuple(m.get("exclude_zones") or ()),
              weekly_tolerance=m.get("weekly_tolerance"), max_spots_per_unit=m.get("max_spots_per_unit"),
              extra={k: v for k, v in m.items() if k not in Mix.__dataclass_fields__})
    return Deal(name=booked.name, advertiser=booked.advertiser or "", demo=booked.demo, impressions=booked.guarantee,
                first_week=booked.first_week, last_week=booked.last_week, price_cpm=booked.price_cpm,
                confidence=booked.confidence, pad=booked.pad, mix=mix, path=path,
                terms=terms_from_dict(t.get("terms")))


def _opt(value) -> float | None:
    if value is None:
        return None
    value = float(value)
    return None if not np.isfinite(value) else value


def _log(conn: sqlite3.Connection, deal: str, action: str, detail: dict) -> None:
    conn.execute("INSERT INTO events (at, deal, action, user, detail_json) VALUES (?, ?, ?, ?, ?)",
                 (_now(), deal, action, os_user(), json.dumps(detail, default=str)))


def _sleep_hook() -> None:
    delay = os.environ.get(_SLEEP_ENV)
    if delay:
        time.sleep(float(delay))


def commit_plan(scenario: Any, deal_name: str, book: str | os.PathLike | None = None, *,
                planner: Callable[..., Any], **plan_kwargs) -> CommitResult:
    """Plan `deal_name` against the avails not already held and commit it with its spots.

    The plan is made first against a snapshot of the holds (no lock held while solving); then,
    inside one `BEGIN IMMEDIATE` transaction, the holds are read again and the plan is checked
    unit by unit against the avails left. If another desk committed first and the plan no longer
    fits, the deal is re-planned inside the transaction (the write lock held) against the fresh
    holds. Only a plan that fits is written, together with its deal row, before COMMIT.

    `planner(scenario, deal_name, held=DataFrame, **plan_kwargs)` returns a plan with `.spots`
    (`planner.workflows.commit_deal` passes its planner on the forecast). An undeliverable deal is not committed: the result says
    so (`committed=False`, `reason`); a deal already in the book raises InputError.
    """
    if deal_name not in scenario.deals:
        raise InputError(f"{getattr(scenario, 'path', '')}: no deal named {deal_name!r} in deals/ "
                         f"(known: {', '.join(sorted(scenario.deals)) or 'none'})")
    deal = scenario.deals[deal_name]
    path = book_path(scenario, book)
    conn = open_book(path)
    try:
        if conn.execute("SELECT 1 FROM deals WHERE name = ?", (deal_name,)).fetchone():
            raise InputError(f"{path}: deal {deal_name!r} is already in the book (release it first)")
        plan = planner(scenario, deal_name, held=_held_from(conn), **plan_kwargs)
        if not _plan_is_deliverable(plan):
            return CommitResult(deal_name, False, str(path), reason=_plan_reason(plan), plan=plan)
        try:
            result = _check_and_hold(conn, path, scenario, deal, plan, planner, plan_kwargs)
        except _NotDeliverable as exc:
            return CommitResult(deal_name, False, str(path), replanned=True, plan=exc.plan,
                                reason="another desk committed first and the avails left no "
                                       "longer deliver this deal: " + _plan_reason(exc.plan))
        return result
    finally:
        conn.close()


class _NotDeliverable(Exception):
    def __init__(self, plan: Any):
        super().__init__("not deliverable")
        self.plan = plan


def _check_and_hold(conn, path, scenario, deal, plan, planner, plan_kwargs) -> CommitResult:
    """Inside BEGIN IMMEDIATE: re-read the holds, re-plan if the plan no longer fits, write."""
    deal_name = deal.name
    replanned = False
    with write_transaction(conn):
        if conn.execute("SELECT 1 FROM deals WHERE name = ?", (deal_name,)).fetchone():
            raise InputError(f"{path}: deal {deal_name!r} was committed by another desk meanwhile")
        held = _held_from(conn)
        spots = _plan_spots(plan)
        if len(over_avails(held, scenario.inventory, spots)):
            replanned = True
            plan = planner(scenario, deal_name, held=held, **plan_kwargs)
            if not _plan_is_deliverable(plan):
                raise _NotDeliverable(plan)  # rolls the transaction back
            spots = _plan_spots(plan)
            bad = over_avails(held, scenario.inventory, spots)
            if len(bad):  # the planner ignored the holds: never write an over-held unit
                raise RuntimeError(f"planner returned a plan over the avails left in {len(bad)} units")
        summary = _plan_summary(plan, spots)
        _insert_deal(conn, scenario, deal, spots, summary)
        _sleep_hook()
    return CommitResult(deal_name, True, str(path), replanned=replanned, summary=summary, plan=plan)


def release_deal(scenario_or_path: Any, name: str, book: str | os.PathLike | None = None) -> BookDeal:
    """Remove a committed deal and free its holds (one transaction); returns what was removed.

    Its stored postings go with it (`ON DELETE CASCADE`; foreign keys are on in `_connect`).
    """
    path = book_path(scenario_or_path, book)
    if not path.exists():
        raise InputError(f"{path}: deal {name!r} is not in the book (no book here)")
    conn = open_book(path)
    try:
        with write_transaction(conn):
            row = conn.execute("SELECT * FROM deals WHERE name = ?", (name,)).fetchone()
            if row is None:
                raise InputError(f"{path}: deal {name!r} is not in the book")
            removed = _deal_from_row(row, _holds_of(conn, name).drop(columns="deal"),
                                     _postings_of(conn, name).drop(columns="deal"))
            conn.execute("DELETE FROM holds WHERE deal = ?", (name,))
            conn.execute("DELETE FROM deals WHERE name = ?", (name,))
            _log(conn, name, "release", {"spots": removed.spots})
        return removed
    finally:
        conn.close()


def _posting_rows(name: str, postings: pd.DataFrame, path: Path) -> list[tuple]:
    """Rows to insert into `postings` for deal `name` from a DataFrame `POSTING_COLUMNS`
    (whole aired spots >= 0, impressions >= 0, one row per unit-week); InputError otherwise."""
    missing = [c for c in POSTING_COLUMNS if c not in postings.columns]
    if missing:
        raise InputError(f"{path}: postings for {name!r} lack column(s) {', '.join(missing)}")
    try:
        p = postings[POSTING_COLUMNS].astype({"week": "int64", "spots_aired": "int64", "impressions": float})
    except (ValueError, TypeError) as exc:
        raise InputError(f"{path}: postings for {name!r} are not whole weeks, whole spots and numbers ({exc})") from exc
    bad = (p["spots_aired"] < 0) | ~np.isfinite(p["impressions"]) | (p["impressions"] < 0)
    if bad.any():
        raise InputError(f"{path}: postings for {name!r} hold negative or non-finite figures")
    if p.duplicated(UNIT_KEY).any():
        raise InputError(f"{path}: postings for {name!r} repeat a unit-week")
    text = [p[c].astype(str).tolist() for c in ("zone", "network", "daypart")]
    return list(zip([name] * len(p), *text, p["week"].tolist(), p["spots_aired"].tolist(),
                    p["impressions"].tolist()))


def replace_holds(scenario: Any, name: str, spots: pd.DataFrame, summary: dict,
                  book: str | os.PathLike | None = None, *, action: str = "rebalance",
                  postings: pd.DataFrame | None = None) -> None:
    """Replace a committed deal's holds by `spots` (HOLD_COLUMNS) in one checked transaction.

    `postings` (DataFrame `POSTING_COLUMNS`: posted unit-weeks, whole aired spots, impressions in
    the deal's demo), when given, replaces the deal's stored postings in the same transaction
    (a rebalance stores the evidence its forecast update used). Raises InputError if the deal
    is not in the book, if the new holds with everyone else's would exceed a unit's avails
    (another desk took them meanwhile: re-run), or if the postings are malformed.
    """
    path = book_path(scenario, book)
    posting_rows = None if postings is None else _posting_rows(name, postings, path)
    conn = open_book(path)
    try:
        with write_transaction(conn):
            row = conn.execute("SELECT * FROM deals WHERE name = ?", (name,)).fetchone()
            if row is None:
                raise InputError(f"{path}: deal {name!r} is not in the book")
            spots = spots[spots["spots"] > 0].copy()
            for c in HOLD_COLUMNS:
                if c not in spots.columns:
                    spots[c] = np.nan
            spots = spots.astype({"week": "int64", "spots": "int64"})[HOLD_COLUMNS]
            bad = over_avails(_held_from(conn, exclude=[name]), scenario.inventory, spots)
            if len(bad):
                raise InputError(f"{path}: new holds for {name!r} exceed the avails left in {len(bad)} "
                                 f"unit(s) (first: {bad.iloc[0][UNIT_KEY].to_dict()}); re-run")
            conn.execute("DELETE FROM holds WHERE deal = ?", (name,))
            conn.executemany(
                """INSERT INTO holds (deal, zone, network, daypart, week, spots, rate, cost,
                       expected_impressions, sd) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)""",
                [(name, r.zone, r.network, r.daypart, int(r.week), int(r.spots), _opt(r.rate),
                  _opt(r.cost), _opt(r.expected_impressions), _opt(r.sd))
                 for r in spots.itertuples(index=False)])
            if posting_rows is not None:
                conn.execute("DELETE FROM postings WHERE deal = ?", (name,))
                conn.executemany(
                    f"""INSERT INTO postings (deal, {', '.join(POSTING_COLUMNS)})
                           VALUES (?, ?, ?, ?, ?, ?, ?)""", posting_rows)
            old = json.loads(row["summary_json"] or "{}")
            new = {**old, **summary, "spots": int(spots["spots"].sum())}
            conn.execute(
                """UPDATE deals SET expected_impressions = ?, sd = ?, probability = ?, cost = ?,
                       spots = ?, summary_json = ? WHERE name = ?""",
                (new.get("expected_impressions"), new.get("sd"), new.get("probability"),
                 new.get("cost"), new["spots"], json.dumps(new, default=str), name))
            _log(conn, name, action, summary)
            _sleep_hook()
    finally:
        conn.close()


def check_book(scenario: Any, book: str | os.PathLike | None = None) -> dict:
    """Integrity check: units over avails, holds without a deal, deals whose stored spot count
    differs from their holds. Returns counts (all zero for a consistent book)."""
    path = book_path(scenario, book)
    with _reader(path) as conn:
        if conn is None:
            return {"over_avails": 0, "orphan_holds": 0, "spot_count_mismatch": 0, "deals": 0}
        integrity = conn.execute("PRAGMA integrity_check").fetchone()[0]
        orphan = conn.execute(
            "SELECT COUNT(*) FROM holds WHERE deal NOT IN (SELECT name FROM deals)").fetchone()[0]
        mismatch = conn.execute(
            """SELECT COUNT(*) FROM deals d WHERE COALESCE(d.spots, 0) !=
                   COALESCE((SELECT SUM(spots) FROM holds h WHERE h.deal = d.name), 0)""").fetchone()[0]
        n = conn.execute("SELECT COUNT(*) FROM deals").fetchone()[0]
        over = over_avails(_held_from(conn), scenario.inventory)
        return {"over_avails": int(len(over)), "orphan_holds": int(orphan),
                "spot_count_mismatch": int(mismatch), "deals": int(n), "integrity": integrity}
