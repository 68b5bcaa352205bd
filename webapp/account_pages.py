"""The coordinator's Accounts page: add a reader or coordinator account, disable and enable it, reset its password
(the new one shown once) and sign it out everywhere — the operations of ``limen users``, through the same functions
(:mod:`webapp.account_admin`), audited with the coordinator's name, CSRF-protected like every form.

A generated password is shown on the page that answers the POST, never put in a flash message (those travel in
the session cookie) nor in the audit log; the page is sent ``Cache-Control: no-store``.  Resetting a password
asks for confirmation on a page of its own (the old password stops working at once).
"""

from __future__ import annotations

from flask import Blueprint, abort, flash, redirect, render_template, request, url_for
from flask_login import current_user
from sqlalchemy import select

from scorer.errors import LimenError
from webapp import account_admin
from webapp.models import ROLES, User, db
from webapp.security import role_required

bp = Blueprint("accounts", __name__, url_prefix="/coordinator/accounts")
coordinator_only = role_required("coordinator")


def _user(user_id: int) -> User:
    user = db().get(User, user_id)
    if user is None:
        abort(404)
    return user


@bp.route("/")
@coordinator_only
def page():
    accounts = db().execute(select(User).order_by(User.role, User.username)).scalars().all()
    return render_template(
        "coordinator/accounts.html", accounts=accounts, roles=ROLES, me=int(current_user.id), form=request.form
    )


@bp.errorhandler(LimenError)
def _refused(exc):
    """A refused operation (a taken name, one's own account) is shown on the Accounts page, not a dead end."""
    db().rollback()
    flash(str(exc), "error")
    return page(), 400


@bp.route("/", methods=["POST"])
@coordinator_only
def add():
    """A new account with a generated password, shown once on the page this answers with."""
    role = request.form.get("role") or "reader"
    password = account_admin.generate_password()
    user = account_admin.add_account(db(), request.form.get("username") or "", role, password)
    db().commit()
    return render_template("coordinator/password_once.html", user=user, password=password, new=True)


@bp.route("/<int:user_id>/disable", methods=["POST"])
@coordinator_only
def disable(user_id):
    user = _user(user_id)
    account_admin.disable(user, acting_id=int(current_user.id))
    db().commit()
    flash(f"{user.username} is disabled: it cannot sign in, and its sessions have ended. Its reads are kept.", "info")
    return redirect(url_for("accounts.page"))


@bp.route("/<int:user_id>/enable", methods=["POST"])
@coordinator_only
def enable(user_id):
    user = _user(user_id)
    account_admin.enable(user)
    db().commit()
    flash(f"{user.username} can sign in again with its password.", "info")
    return redirect(url_for("accounts.page"))


@bp.route("/<int:user_id>/password")
@coordinator_only
def confirm_reset(user_id):
    """Ask before a password is replaced (the old one stops working at once)."""
    return render_template("coordinator/confirm_reset.html", user=_user(user_id))


@bp.route("/<int:user_id>/password", methods=["POST"])
@coordinator_only
def reset_password(user_id):
    user = _user(user_id)
    if request.form.get("confirm") != "yes":  # not from the confirmation page: show it
        return redirect(url_for("accounts.confirm_reset", user_id=user.id))
    password = account_admin.generate_password()
    account_admin.reset_password(user, password, acting_id=int(current_user.id))
    db().commit()
    return render_template("coordinator/password_once.html", user=user, password=password, new=False)


@bp.route("/<int:user_id>/sign-out", methods=["POST"])
@coordinator_only
def sign_out_everywhere(user_id):
    """End every session of an account (a lost laptop, a shared password): it must sign in again."""
    user = _user(user_id)
    account_admin.sign_out_everywhere(user)
    db().commit()
    flash(f"Every session of {user.username} has ended; the account must sign in again.", "info")
    return redirect(url_for("accounts.page"))
