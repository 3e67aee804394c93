"""Make or revoke a user's token for scripts: ``api_token create|revoke USERNAME``."""

from django.contrib.auth import get_user_model
from django.core.management import BaseCommand, CommandError
from rest_framework.authtoken.models import Token

from emicase.api.account import token_replace, token_revoke


class Command(BaseCommand):
    help = (
        "Make (create) or revoke a user's API token for scripts. 'create' prints the new key; it refuses "
        "when the user already has one unless --replace is given (the old key then stops working)."
    )

    def add_arguments(self, parser):
        parser.add_argument("action", choices=["create", "revoke"])
        parser.add_argument("username")
        parser.add_argument(
            "--replace", action="store_true", help="create: replace an existing token"
        )

    def handle(self, *args, action: str, username: str, replace: bool, **opts):
        user = get_user_model().objects.filter(username=username).first()
        if user is None:
            raise CommandError(f"No user named {username!r}.")
        if action == "create":
            existing = Token.objects.filter(user=user).first()
            if existing is not None and not replace:
                raise CommandError(
                    f"{username} already has a token (made {existing.created:%Y-%m-%d %H:%M}); "
                    "pass --replace to make a new one, or revoke it first."
                )
            self.stdout.write(token_replace(user=user).key)
            return
        if not token_revoke(user=user):
            raise CommandError(f"{username} has no token to revoke.")
        if opts["verbosity"]:
            self.stdout.write(f"Revoked the token of {username}.")
