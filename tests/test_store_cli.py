"""`whirlwatch db upgrade`, `machines import|export`, `user add`, `token create` through
click's CliRunner on real databases."""

from __future__ import annotations

import hashlib
import tomllib

from click.testing import CliRunner
from fixtures_db import small_registry
from sqlalchemy import select

from monitor.cli import main
from monitor.model.registry_file import dump_registry, parse_registry
from monitor.store import Store, verify_api_token, verify_password
from monitor.store.models import ApiToken, User


def _run(args, **kw):
    result = CliRunner().invoke(main, args, catch_exceptions=False, **kw)
    return result


def test_commands_end_to_end(database_url, tmp_path):
    # before the schema exists, commands say how to create it
    r = _run(["user", "add", "ana", "--role", "engineer", "--database", database_url, "--password-stdin"], input="pw-long-enough\n")
    assert r.exit_code != 0 and "db upgrade" in r.output
    assert _run(["db", "upgrade", "--database", database_url]).exit_code == 0

    registry_file = tmp_path / "plant.toml"
    registry_file.write_text(dump_registry(small_registry()))
    assert _run(["machines", "import", str(registry_file), "--database", database_url]).exit_code == 0
    r = _run(["machines", "export", "--database", database_url])
    assert r.exit_code == 0
    assert parse_registry(tomllib.loads(r.stdout)) == small_registry()

    r = _run(["user", "add", "ana", "--role", "engineer", "--database", database_url, "--password-stdin"], input="pw-long-enough\n")
    assert r.exit_code == 0, r.output
    r = _run(["token", "create", "--user", "ana", "--database", database_url])
    assert r.exit_code == 0
    token = r.stdout.strip()
    assert r.stdout == token + "\n"  # the token alone on stdout

    store = Store.open(database_url)
    try:
        with store.transaction() as s:
            row = s.execute(select(ApiToken)).scalar_one()
            # stored as the sha256 hex digest (FIPS 180-4 via hashlib), never the token
            assert row.token_hash == hashlib.sha256(token.encode()).hexdigest()
            assert verify_api_token(s, token).name == "ana"
            assert verify_api_token(s, token + "x") is None
            user = s.execute(select(User)).scalar_one()
            assert user.role == "engineer" and "pw-long-enough" not in user.password_hash
            assert verify_password(s, "ana", "pw-long-enough") is not None
            assert verify_password(s, "ana", "wrong-password") is None
    finally:
        store.close()

    # revoking through the command: the token no longer authenticates
    r = _run(["token", "revoke", "--token-stdin", "--database", database_url], input=token + "\n")
    assert r.exit_code == 0, r.output
    r = _run(["token", "revoke", "--token-stdin", "--database", database_url], input=token + "\n")
    assert r.exit_code == 2 and "already revoked" in r.output
    store = Store.open(database_url)
    try:
        with store.transaction() as s:
            assert verify_api_token(s, token) is None
    finally:
        store.close()

    r = _run(["token", "create", "--user", "nobody", "--database", database_url])
    assert r.exit_code == 2 and "nobody" in r.output
    r = _run(["user", "add", "bo", "--role", "boss", "--database", database_url, "--password-stdin"], input="x\n")
    assert r.exit_code == 2


def test_bad_registry_file_is_a_usage_error(tmp_path):
    url = f"sqlite:///{tmp_path / 'x.sqlite'}"
    f = tmp_path / "bad.toml"
    f.write_text('[[machines]]\nid = "m1"\nclass = "group9/rigid"\n')
    r = _run(["machines", "import", str(f), "--database", url])
    assert r.exit_code == 2 and "'class'" in r.output


def test_token_use_is_recorded_coarsely_and_revocation_by_id(database_url):
    from monitor.store.auth import (
        LAST_USE_RESOLUTION,
        create_api_token,
        create_user,
        revoke_api_token_by_id,
    )

    assert _run(["db", "upgrade", "--database", database_url]).exit_code == 0
    store = Store.open(database_url)
    try:
        with store.transaction() as s:
            create_user(s, "cy", "pw-long-enough", "viewer")
            token = create_api_token(s, "cy")
        with store.transaction() as s:
            assert verify_api_token(s, token).name == "cy"
            first = s.execute(select(ApiToken)).scalar_one().last_used_at
            assert first is not None
        with store.transaction() as s:
            # a second use inside the resolution window writes nothing
            assert verify_api_token(s, token).name == "cy"
            assert not s.dirty
            row = s.execute(select(ApiToken)).scalar_one()
            assert row.last_used_at == first
            row.last_used_at = first - 2 * LAST_USE_RESOLUTION
        with store.transaction() as s:
            assert verify_api_token(s, token).name == "cy"
            assert s.execute(select(ApiToken)).scalar_one().last_used_at != first - 2 * LAST_USE_RESOLUTION
        with store.transaction() as s:
            token_id = s.execute(select(ApiToken.id)).scalar_one()
            assert revoke_api_token_by_id(s, token_id) is True
            assert revoke_api_token_by_id(s, token_id) is False
            assert revoke_api_token_by_id(s, token_id + 1000) is False
        with store.transaction() as s:
            assert verify_api_token(s, token) is None
    finally:
        store.close()
