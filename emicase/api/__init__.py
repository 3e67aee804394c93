"""The REST API for bench automation (Django REST Framework)."""
