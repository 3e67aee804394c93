from django.contrib import admin
from django.contrib.auth import views as auth_views
from django.urls import include, path

from emicase import views

urlpatterns = [
    path("", views.home, name="home"),
    path("signin/", auth_views.LoginView.as_view(), name="login"),
    path("signout/", auth_views.LogoutView.as_view(), name="logout"),
    path("health/", views.health, name="health"),
    path("api/", include("emicase.api.urls")),
    path("admin/", admin.site.urls),
    path("", include("emicase.search_urls")),
]
