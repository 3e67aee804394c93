"""The Celery application. Settings come from Django's, prefixed ``CELERY_``."""

import os

from celery import Celery

os.environ.setdefault("DJANGO_SETTINGS_MODULE", "emicase.settings")

app = Celery("emicase")
app.config_from_object("django.conf:settings", namespace="CELERY")
app.autodiscover_tasks(["emicase"])
