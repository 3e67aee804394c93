"""WSGI entry point (gunicorn emicase.wsgi)."""

import os

from django.core.wsgi import get_wsgi_application

os.environ.setdefault("DJANGO_SETTINGS_MODULE", "emicase.settings")

application = get_wsgi_application()
