"""``demaudit schedule add|list|remove``: a server's cron schedules of a job spec."""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

from demaudit.service.cli.exits import EXIT_CLEAN
from demaudit.service.cli.remote import add_connection_options, call, refused, when
from demaudit.service.cli.server_jobs import SERVER_SPEC_HELP
from demaudit.service.settings import Settings
from demaudit.workers import spec as job_spec

__all__ = ["add_schedule_parser"]


def add_schedule_parser(sub: Any) -> None:
    """``demaudit schedule ACTION``."""
    schedule = sub.add_parser("schedule", help="run a job spec on a server on a cron schedule")
    actions = schedule.add_subparsers(required=True, metavar="ACTION")
    _add_add_parser(actions)
    listing = actions.add_parser("list", help="list the schedules and their last runs")
    add_connection_options(listing)
    listing.set_defaults(handler=list_command)
    remove = actions.add_parser("remove", help="delete a schedule (its jobs stay)")
    remove.add_argument("id", help="schedule id")
    add_connection_options(remove)
    remove.set_defaults(handler=remove_command)


def _add_add_parser(actions: Any) -> None:
    add = actions.add_parser("add", help="add a schedule (e.g. a nightly re-check)")
    add.add_argument("spec", type=Path, help=SERVER_SPEC_HELP)
    add.add_argument(
        "--cron",
        required=True,
        help="when, on the --timezone clock: e.g. '0 2 * * *' (02:00 daily)",
    )
    add.add_argument(
        "--timezone",
        default="UTC",
        help="IANA time zone the cron follows, daylight-saving time included, e.g. Europe/Oslo "
        "(default UTC)",
    )
    add.add_argument("--name", help="name of the schedule (default: the spec's name)")
    add.add_argument("--webhook", help="URL to POST the change report to")
    add.add_argument(
        "--notify",
        choices=["regressions", "always"],
        default="regressions",
        help="call the webhook after runs with regressions (default) or after every run",
    )
    add.add_argument(
        "--baseline",
        choices=["latest"],
        help="'latest': re-check against the schedule's last successful run (else full runs)",
    )
    add_connection_options(add)
    add.set_defaults(handler=add_command)


def add_command(args: argparse.Namespace, settings: Settings) -> int:
    """POST the schedule; print its id, next run and (once) its webhook signing secret."""
    data = job_spec.load_spec_file(args.spec)
    name = args.name or (data.get("name") if isinstance(data, dict) else None) or args.spec.stem
    body: dict[str, Any] = {"name": str(name), "cron": args.cron, "inputs": data}
    body["timezone"] = args.timezone
    body["notify"] = args.notify
    if args.webhook:
        body["webhook"] = args.webhook
    if args.baseline:
        body["baseline"] = args.baseline

    def added(response: Any) -> int:
        if response.status_code != 201:
            return refused(response)
        schedule = response.json()
        next_run = when(schedule["nextRun"])
        zone = schedule.get("timezone", "UTC")
        if zone != "UTC" and schedule["nextRun"]:
            next_run += f" UTC ({when(schedule['nextRun'], zone)} {zone})"
        print(f"schedule {schedule['id']} added: next run {next_run}")
        if schedule.get("webhookSecret"):
            print(f"webhook signing secret (shown only now): {schedule['webhookSecret']}")
        return EXIT_CLEAN

    return call(args, settings, lambda http: added(http.post("/schedules", json=body)))


def list_command(args: argparse.Namespace, settings: Settings) -> int:
    """A table of the schedules with their next and last runs."""

    def listed(response: Any) -> int:
        if response.status_code != 200:
            return refused(response)
        rows = response.json()["schedules"]
        if not rows:
            print("no schedules")
            return EXIT_CLEAN
        print(f"{'id':<34}{'name':<22}{'cron':<16}{'time zone':<20}{'next run (UTC)':<19}last run")
        for s in rows:
            zone = s.get("timezone", "UTC")
            print(
                f"{s['id']:<34}{s['name'][:21]:<22}{s['cron']:<16}{zone[:19]:<20}"
                f"{when(s['nextRun']):<19}{_last_run(s.get('lastRun'))}"
            )
        return EXIT_CLEAN

    return call(args, settings, lambda http: listed(http.get("/schedules", params={"limit": 1000})))


def _last_run(last: dict[str, Any] | None) -> str:
    if not last:
        return "-"
    done = f"{when(last['slot'])} {last['outcome']}"
    if last.get("jobStatus"):
        done += f" (job {last['jobID'][:12]} {last['jobStatus']})"
    return done


def remove_command(args: argparse.Namespace, settings: Settings) -> int:
    """DELETE the schedule (its jobs stay)."""

    def removed(response: Any) -> int:
        if response.status_code != 204:
            return refused(response)
        print(f"schedule {args.id} removed")
        return EXIT_CLEAN

    return call(args, settings, lambda http: removed(http.delete(f"/schedules/{args.id}")))
