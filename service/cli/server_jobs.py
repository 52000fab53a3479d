"""``demaudit submit`` and ``demaudit status``: a job spec sent to a server, a job followed."""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

from demaudit.service.cli.exits import EXIT_CLEAN, server_job_status
from demaudit.service.cli.remote import (
    add_server_options,
    call,
    print_job_links,
    refused,
    watch,
)
from demaudit.service.settings import Settings
from demaudit.workers import spec as job_spec

__all__ = ["SERVER_SPEC_HELP", "add_status_parser", "add_submit_parser"]

SERVER_SPEC_HELP = (
    "job spec (YAML or JSON); relative paths resolve against the server's first data root"
)


def add_submit_parser(sub: Any) -> None:
    """``demaudit submit SPEC --server URL``."""
    submit = sub.add_parser("submit", help="submit a job spec to a demaudit server")
    submit.add_argument("spec", type=Path, help=SERVER_SPEC_HELP)
    add_server_options(submit)
    submit.add_argument("--watch", action="store_true", help="follow the job to its end")
    submit.set_defaults(handler=submit_command)


def add_status_parser(sub: Any) -> None:
    """``demaudit status JOB --server URL``."""
    status = sub.add_parser("status", help="show (or follow) a job on a demaudit server")
    status.add_argument("job", help="job id (or the job's URL)")
    add_server_options(status)
    status.add_argument("--watch", action="store_true", help="progress bar until the job ends")
    status.set_defaults(handler=status_command)


def submit_command(args: argparse.Namespace, settings: Settings) -> int:
    """POST the spec as an asynchronous execution; with --watch follow the job to its end."""
    data = job_spec.load_spec_file(args.spec)

    def submitted(http: Any) -> int:
        response = http.post(
            "/processes/dem-audit/execution",
            json={"inputs": data},
            headers={"Prefer": "respond-async"},
        )
        if response.status_code != 201:
            return refused(response)
        job = response.json()
        print(f"job {job['jobID']} {job['status']}: {response.headers.get('Location')}")
        if args.watch:
            return watch(http, job["jobID"], interval=args.interval)
        return EXIT_CLEAN

    return call(args, settings, submitted)


def status_command(args: argparse.Namespace, settings: Settings) -> int:
    """Print the job's status (or follow it with --watch); the exit status says how it went."""
    job_id = args.job.rstrip("/").rsplit("/", 1)[-1]

    def shown(http: Any) -> int:
        if args.watch:
            return watch(http, job_id, interval=args.interval)
        response = http.get(f"/jobs/{job_id}")
        if response.status_code != 200:
            return refused(response)
        job = response.json()
        print(f"job {job['jobID']} {job['status']} ({job['progress']} %): {job['message']}")
        print_job_links(args.server, job["jobID"], job["status"])
        return server_job_status(job["status"], job.get("message") or "", cause=job.get("cause"))

    return call(args, settings, shown)
