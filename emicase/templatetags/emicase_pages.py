"""Small display filters for the pages: frequencies in MHz, signed dB, people's names."""

from __future__ import annotations

from django import template

register = template.Library()

MINUS = "\u2212"


@register.filter
def mhz(value, digits: int = 3) -> str:
    """Hz → 'x.xxx' MHz (no unit), '' for None."""
    if value is None or value == "":
        return ""
    return f"{float(value) / 1e6:.{int(digits)}f}"


@register.filter
def db(value, digits: int = 1) -> str:
    """A signed level difference with a true minus sign: '−8.5', '+3.2'; '—' for None."""
    if value is None or value == "":
        return "—"
    v = round(float(value), int(digits))
    text = f"{abs(v):.{int(digits)}f}"
    if v < 0:
        return MINUS + text
    return ("+" if v > 0 else "") + text


@register.filter
def level(value, digits: int = 1) -> str:
    """A level with a true minus sign, '—' for None."""
    if value is None or value == "":
        return "—"
    v = round(float(value), int(digits))
    return (MINUS if v < 0 else "") + f"{abs(v):.{int(digits)}f}"


@register.filter
def person(user) -> str:
    if user is None:
        return "the analysis"
    return user.get_full_name() or user.username


@register.filter
def unit(value) -> str:
    from emicase.charts import unit_label

    return unit_label(value or "")


@register.simple_tag(takes_context=True)
def may_write(context) -> bool:
    """Whether the signed-in user may change anything in any of their teams (one query, once per request)."""
    request = context.get("request")
    if request is None or not request.user.is_authenticated:
        return False
    if not hasattr(request, "_emicase_may_write"):
        from emicase.models import Membership

        request._emicase_may_write = Membership.objects.filter(
            user=request.user, role__in=[Membership.Role.LEAD, Membership.Role.ENGINEER]
        ).exists()
    return request._emicase_may_write
