"""The test suite's settings: the app's own, with everything written apart from a developer's data.

Only locations change, so a developer's running ``launch`` (its database, its
broker folders, its worker) never sees the suite's data or messages. The
database and broker still follow DATABASE_URL / CELERY_BROKER_URL, as in
production.

Each pytest run (and the worker processes it starts, which inherit
``EMICASE_TEST_RUN``) gets its own corner, so two runs at once on one machine
never share a database, a broker queue or a media folder: files under
var/test/run-<id>/, the PostgreSQL test database test_<name>_<id>, and Redis
keys prefixed with the run id. ``tests/conftest.py`` removes the folder of a
run that passed.
"""

import os
from pathlib import Path

RUN_ID = os.environ.setdefault("EMICASE_TEST_RUN", str(os.getpid()))
os.environ.setdefault(
    "EMICASE_VAR_DIR", str(Path(__file__).resolve().parent.parent / "var" / "test" / f"run-{RUN_ID}")
)

from emicase.settings import *  # noqa: E402,F403
from emicase.settings import CELERY_BROKER_TRANSPORT_OPTIONS, CELERY_BROKER_URL, DATABASES  # noqa: E402

PASSWORD_HASHERS = ["django.contrib.auth.hashers.MD5PasswordHasher"]  # fast sign-ins in tests

if DATABASES["default"]["ENGINE"] == "django.db.backends.postgresql":
    DATABASES["default"]["TEST"] = {"NAME": f"test_{DATABASES['default']['NAME']}_{RUN_ID}"}
if CELERY_BROKER_URL.startswith("redis://"):
    CELERY_BROKER_TRANSPORT_OPTIONS = {**CELERY_BROKER_TRANSPORT_OPTIONS, "global_keyprefix": f"emicase-test-{RUN_ID}:"}
    CELERY_RESULT_BACKEND_TRANSPORT_OPTIONS = {"global_keyprefix": f"emicase-test-{RUN_ID}:"}
