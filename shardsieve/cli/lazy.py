"""A click group whose subcommands are imported only when used (keeps `--help` and startup fast)."""

from __future__ import annotations

import importlib

import click


class LazyGroup(click.Group):
    """Subcommands given as {name: "module.path:attribute"}; imported on first use."""

    def __init__(self, *args: object, lazy_commands: dict[str, str] | None = None, **kwargs: object) -> None:
        super().__init__(*args, **kwargs)  # type: ignore[arg-type]
        self.lazy_commands = dict(lazy_commands or {})

    def list_commands(self, ctx: click.Context) -> list[str]:
        return sorted(set(super().list_commands(ctx)) | set(self.lazy_commands))

    def get_command(self, ctx: click.Context, cmd_name: str) -> click.Command | None:
        if cmd_name in self.lazy_commands:
            module_name, attr = self.lazy_commands[cmd_name].split(":")
            module = importlib.import_module(module_name)
            command = getattr(module, attr)
            if not isinstance(command, click.Command):
                raise TypeError(f"{self.lazy_commands[cmd_name]} is not a click command")
            return command
        return super().get_command(ctx, cmd_name)
