"""User-facing errors: one line that names the file, table and key; the CLI exits with status 2."""


class UserError(Exception):
    """A mistake in the user's input (scene file, option, image); never a bug in tracer."""


def input_error(path, table: str | None, key: str | None, problem: str) -> UserError:
    """Build the one-line error `FILE: [table] key: problem` (table and key when known)."""
    where = str(path)
    if table:
        where += f": [{table}]"
    if key:
        where += f" {key}" if table else f": {key}"
    return UserError(f"{where}: {problem}")
