"""The test suite's settings: the app's own, with everything written under var/test/.

Only the location changes, so a developer's running ``launch`` (its database,
its broker folders, its worker) never sees the suite's data or messages. The
database and broker still follow DATABASE_URL / CELERY_BROKER_URL, as in
production.
"""

import os
from pathlib import Path

os.environ.setdefault("EMICASE_VAR_DIR", str(Path(__file__).resolve().parent.parent / "var" / "test"))

from emicase.settings import *  # noqa: E402,F403

PASSWORD_HASHERS = ["django.contrib.auth.hashers.MD5PasswordHasher"]  # fast sign-ins in tests
