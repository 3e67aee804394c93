"""emicase: the web application (Django project and app).

The Celery app is imported here so ``@shared_task`` binds to it whenever
Django starts.
"""

from emicase.celery import app as celery_app

__all__ = ["celery_app"]
