"""The signature search: its pages and its API endpoint (mounted at the site's root)."""

from django.urls import path

from emicase import search_api, search_views

app_name = "search"

urlpatterns = [
    path("similar-problems/", search_views.similar, name="similar"),
    path("cases/<int:case_id>/similar-problems/", search_views.case_similar, name="case_similar"),
    path("api/similar-problems/", search_api.SimilarProblemsView.as_view(), name="api"),
]
