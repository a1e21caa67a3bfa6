"""The team store of the README: its SQL (roles, database, grants) run verbatim on the test server,
then the owner creates the schema, a writer stores runs and a reader reads them but cannot write."""

import itertools
import os
import re
from pathlib import Path

import pytest
from typer.testing import CliRunner

from tests.cli_helpers import CLI_FIT_OPTIONS, cli_small_frame, cli_write_csv

README = Path(__file__).resolve().parents[1] / "README.md"
_numbers = itertools.count()


def readme_team_sql() -> tuple[list[str], str, list[str]]:
    """(statements before ``\\connect``, the database connected to, statements after) of the first
    ``sql`` block of the README's "Team store" section."""
    text = README.read_text(encoding="utf-8")
    section = text[text.index("## Team store"):]
    block = re.search(r"```sql\n(.*?)```", section, re.S).group(1)
    before, _, rest = block.partition("\\connect ")
    database, _, after = rest.partition("\n")

    def split(part):
        return [s.strip() for s in part.split(";") if s.strip()]

    return split(before), database.strip(), split(after)


def test_the_readme_block_is_found_and_names_the_three_roles():
    before, database, after = readme_team_sql()
    assert database == "premia" and any("CREATE DATABASE premia" in s for s in before)
    assert any("GRANT SELECT ON TABLES TO premia_reader" in s for s in after)


@pytest.fixture
def team(store_servers):
    """The README's roles and database under names of this test; dropped afterwards."""
    pg = store_servers.postgresql()
    tag = f"t{os.getpid()}_{next(_numbers)}"
    names = {"premia": f"premia_{tag}", "ana": f"ana_{tag}", "ben": f"ben_{tag}"}

    def renamed(statement):
        return re.sub(r"\b(premia|ana|ben)(?=\b|_)", lambda m: names[m.group(1)], statement)

    before, database, after = readme_team_sql()
    roles = [f"{names['premia']}_{r}" for r in ("owner", "writer", "reader")] + [names["ana"], names["ben"]]
    for statement in before:
        pg.conn.execute(renamed(statement))
    import psycopg

    db_url = pg.url.set(database=names[database])
    with psycopg.connect(db_url.set(drivername="postgresql").render_as_string(hide_password=False),
                         autocommit=True) as conn:
        for statement in after:
            conn.execute(renamed(statement))

    def url_for(role):
        return db_url.set(username=role).render_as_string(hide_password=False)

    try:
        yield {"owner": url_for(roles[0]), "writer": url_for(names["ana"]), "reader": url_for(names["ben"])}
    finally:
        pg.conn.execute(f'DROP DATABASE IF EXISTS "{names["premia"]}" WITH (FORCE)')
        for role in reversed(roles):
            pg.conn.execute(f'DROP ROLE IF EXISTS "{role}"')


def _run(url, *args):
    from panel.cli.app import app

    return CliRunner().invoke(app, ["--store", url, *map(str, args)], catch_exceptions=False)


def test_owner_creates_writer_stores_reader_reads_and_cannot_write(team, tmp_path, monkeypatch):
    csv = cli_write_csv(cli_small_frame(), tmp_path / "trees.csv")
    created = _run(team["owner"], "store", "upgrade")
    assert created.exit_code == 0 and "already at schema version" in created.stdout, created.output
    early = _run(team["writer"], "runs")                  # the writer role sees the tables the owner made
    assert early.exit_code == 0 and "no runs yet" in early.stdout, early.output
    refused = _run(team["reader"], "ingest", csv, "--name", "trees", "--units", "percent")
    assert refused.exit_code == 1 and "may not write store" in refused.stderr, refused.output
    assert len(refused.stderr.strip().splitlines()) == 1
    stored = _run(team["writer"], "ingest", csv, "--name", "trees", "--units", "percent")
    assert stored.exit_code == 0, stored.output
    fitted = _run(team["writer"], "fit", "--data", "trees", *CLI_FIT_OPTIONS, "--max-iter", "5")
    assert fitted.exit_code == 0 and "run 1 stored" in fitted.stdout, fitted.output
    listed = _run(team["reader"], "runs", "--json")
    assert listed.exit_code == 0 and '"id": 1' in listed.stdout, listed.output
    assert _run(team["reader"], "estimates", "1", "--asset", "Elm").exit_code == 0
    assert _run(team["reader"], "store", "info").exit_code == 0
    import panel.model.fit

    def no_fit(*args, **kwargs):
        raise AssertionError("the estimator ran")

    monkeypatch.setattr(panel.model.fit, "fit", no_fit)   # refused before the fit, not after it
    again = _run(team["reader"], "fit", "--data", "trees", *CLI_FIT_OPTIONS, "--max-iter", "5")
    assert again.exit_code == 1 and "may not write store" in again.stderr, again.output
    assert _run(team["writer"], "store", "upgrade").exit_code == 0           # nothing to do, no ALTER


def test_a_user_without_any_grant_gets_one_line_not_a_traceback(team, store_servers, tmp_path):
    pg = store_servers.postgresql()
    stranger = f"stranger_{os.getpid()}_{next(_numbers)}"
    pg.conn.execute(f'CREATE ROLE "{stranger}" LOGIN')
    try:
        url = team["owner"].replace(team["owner"].split("://")[1].split("@")[0], stranger, 1)
        for args in (["runs"], ["ingest", cli_write_csv(cli_small_frame(), tmp_path / "t.csv"), "--name", "t",
                                "--units", "percent"]):
            done = _run(url, *args)
            assert done.exit_code == 1, done.output
            assert len(done.stderr.strip().splitlines()) == 1 and "Traceback" not in done.output
    finally:
        pg.conn.execute(f'DROP ROLE IF EXISTS "{stranger}"')
