from django.apps import AppConfig


class EmicaseConfig(AppConfig):
    name = "emicase"
    verbose_name = "emicase"
    default_auto_field = "django.db.models.BigAutoField"

    def ready(self) -> None:
        # Bind @shared_task to our Celery app in every Django process (web and worker).
        from emicase import celery  # noqa: F401
        from emicase.services.audit import connect_signals

        connect_signals()
