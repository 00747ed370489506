"""Shared pytest fixtures.

Store fixtures: ``backend`` runs a test on SQLite always and on PostgreSQL when
``FOLDFARM_TEST_POSTGRES_URL`` is set; ``new_store_url`` makes empty stores
(a file under ``tmp_path``, or a fresh PostgreSQL schema dropped afterwards);
``store`` is an open :class:`foldfarm.store.Store` on one of them.
"""

from __future__ import annotations

import os
import uuid

import pytest
from sqlalchemy import create_engine
from sqlalchemy.engine import make_url
from sqlalchemy.schema import CreateSchema, DropSchema

from foldfarm.store import Store, resolve_store_url

PG_ENV = "FOLDFARM_TEST_POSTGRES_URL"


def postgres_url() -> str | None:
    """The test PostgreSQL URL (psycopg driver), or None when the variable is unset."""
    url = os.environ.get(PG_ENV)
    return resolve_store_url(url) if url else None


@pytest.fixture(
    params=[
        "sqlite",
        pytest.param(
            "postgres",
            marks=[pytest.mark.postgres, pytest.mark.skipif(not os.environ.get(PG_ENV), reason=f"{PG_ENV} is not set")],
        ),
    ]
)
def backend(request) -> str:
    """Name of the back end the test runs on."""
    return request.param


@pytest.fixture
def new_store_url(backend, tmp_path):
    """Factory: every call returns the URL of a new, empty store on ``backend``."""
    schemas: list[str] = []
    admin = create_engine(postgres_url()) if backend == "postgres" else None

    def make() -> str:
        if admin is None:
            return f"sqlite:///{tmp_path / f'store-{uuid.uuid4().hex[:8]}.sqlite'}"
        schema = f"foldfarm_test_{uuid.uuid4().hex[:12]}"
        with admin.begin() as conn:
            conn.execute(CreateSchema(schema))
        schemas.append(schema)
        # search_path puts every table of the store in the test's own schema.
        return (
            make_url(postgres_url())
            .update_query_dict({"options": f"-csearch_path={schema}"})
            .render_as_string(hide_password=False)
        )

    yield make
    if admin is not None:
        with admin.begin() as conn:
            for schema in schemas:
                conn.execute(DropSchema(schema, cascade=True))
        admin.dispose()


@pytest.fixture
def store(new_store_url):
    """An open store on a new empty database; closed after the test."""
    s = Store(new_store_url())
    yield s
    s.close()
