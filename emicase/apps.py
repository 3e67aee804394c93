from django.apps import AppConfig


class EmicaseConfig(AppConfig):
    name = "emicase"
    verbose_name = "emicase"
    default_auto_field = "django.db.models.BigAutoField"
