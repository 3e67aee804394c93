"""emicase: the web application (Django project and app).

Nothing is imported here, so the stdlib-only bench uploader
(``python -m emicase.uploader``) runs on a PC without Django or Celery. The
Celery app is loaded by ``EmicaseConfig.ready`` whenever Django starts, so
``@shared_task`` binds to it.
"""
