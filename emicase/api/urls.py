"""The API under /api/: resources, their OpenAPI 3 schema, and the interactive docs (no CDN)."""

from django.urls import path
from drf_spectacular.views import SpectacularAPIView, SpectacularSwaggerView
from rest_framework.routers import DefaultRouter

from emicase.api import views

app_name = "api"


class Router(DefaultRouter):
    include_format_suffixes = False


router = Router()
router.register("teams", views.TeamViewSet, basename="team")
router.register("products", views.ProductViewSet, basename="product")
router.register("revisions", views.RevisionViewSet, basename="revision")
router.register("sources", views.SourceViewSet, basename="source")
router.register("scans", views.ScanViewSet, basename="scan")
router.register("cases", views.CaseViewSet, basename="case")
router.register("failing-frequencies", views.FailingFrequencyViewSet, basename="failingfrequency")
router.register("captures", views.CaptureViewSet, basename="capture")
router.register("countermeasures", views.CountermeasureViewSet, basename="countermeasure")
router.register("verifications", views.VerificationViewSet, basename="verification")
router.register("audit", views.AuditEventViewSet, basename="auditevent")

urlpatterns = [
    path("limits/", views.LimitListView.as_view(), name="limits"),
    path("cases/<int:case_id>/timeline/", views.CaseTimelineView.as_view(), name="case-timeline"),
    path("cases/<int:case_id>/comments/", views.CaseCommentsView.as_view(), name="case-comments"),
    path("schema/", SpectacularAPIView.as_view(), name="schema"),
    path("docs/", SpectacularSwaggerView.as_view(url_name="api:schema"), name="docs"),
    *router.urls,
]
