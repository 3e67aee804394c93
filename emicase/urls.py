from django.contrib import admin
from django.contrib.auth import views as auth_views
from django.urls import include, path

from emicase import access_views, views

urlpatterns = [
    path("", views.home, name="home"),
    path("signin/", auth_views.LoginView.as_view(), name="login"),
    path("signout/", auth_views.LogoutView.as_view(), name="logout"),
    path("health/", views.health, name="health"),
    path("api/", include("emicase.api.urls")),
    path("account/", include("emicase.api.account_urls")),
    path("admin/", admin.site.urls),
    path("", include("emicase.search_urls")),
    # Logging a failing result, and a scan's own page (its status while the worker runs).
    path("log-a-fail/", views.log_fail, name="log_fail"),
    path("scans/<int:scan_id>/", views.scan_detail, name="scan"),
    path("scans/<int:scan_id>/status/", views.scan_status, name="scan_status"),
    # The case page and what acts on it.
    path("cases/<int:case_id>/", views.case_detail, name="case"),
    path("cases/<int:case_id>/live/", views.case_live, name="case_live"),
    path("cases/<int:case_id>/comment/", views.case_comment, name="case_comment"),
    path("cases/<int:case_id>/move/", views.case_move, name="case_move"),
    path("cases/<int:case_id>/close/", views.case_close, name="case_close"),
    path("cases/<int:case_id>/reopen/", views.case_reopen, name="case_reopen"),
    path("cases/<int:case_id>/frequencies/confirm/", views.frequencies_confirm, name="frequencies_confirm"),
    path("cases/<int:case_id>/frequencies/new/", views.frequency_add, name="frequency_add"),
    path("frequencies/<int:failing_id>/edit/", views.frequency_edit, name="frequency_edit"),
    path("cases/<int:case_id>/scans/new/", views.case_scan_new, name="case_scan_new"),
    path("cases/<int:case_id>/captures/new/", views.capture_new, name="capture_new"),
    path("captures/<int:capture_id>/", views.capture_detail, name="capture"),
    path("cases/<int:case_id>/locate/", views.locate, name="locate"),
    path("cases/<int:case_id>/fixes/new/", views.fix_new, name="fix_new"),
    path("cases/<int:case_id>/report/", views.case_report, name="case_report"),
    path("cases/<int:case_id>/report.csv", views.case_report_csv, name="case_report_csv"),
    # Countermeasures ("fixes") and their checks.
    path("fixes/<int:countermeasure_id>/", views.fix_detail, name="fix"),
    path("fixes/<int:countermeasure_id>/after-scan/", views.fix_after_scan, name="fix_after_scan"),
    path("fixes/<int:countermeasure_id>/after-capture/", views.fix_after_capture, name="fix_after_capture"),
    path("fixes/<int:countermeasure_id>/estimate/", views.fix_estimate, name="fix_estimate"),
    path("fixes/<int:countermeasure_id>/trial/", views.fix_trial, name="fix_trial"),
    path("fixes/<int:countermeasure_id>/verify/", views.fix_verify, name="fix_verify"),
    path("fixes/<int:countermeasure_id>/reject/", views.fix_reject, name="fix_reject"),
    # Products, revisions and their known emission sources; team settings.
    path("products/", views.products, name="products"),
    path("products/<int:product_id>/", views.product_detail, name="product"),
    path("revisions/<int:revision_id>/", views.revision_detail, name="revision"),
    path("sources/<int:source_id>/edit/", views.source_edit, name="source_edit"),
    path("sources/<int:source_id>/delete/", views.source_delete, name="source_delete"),
    path("teams/<slug:slug>/settings/", views.team_settings, name="team_settings"),
    path("teams/<slug:slug>/members/", access_views.team_members, name="team_members"),
    path("teams/<slug:slug>/audit/", access_views.team_audit, name="team_audit"),
    path("scans/<int:scan_id>/file/", access_views.scan_file, name="scan_file"),
    path("captures/<int:capture_id>/file/", access_views.capture_file, name="capture_file"),
]
