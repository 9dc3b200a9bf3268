"""Run the ``dipshape`` command line in a child process (for the batch fault tests)."""

from service.cli import app

if __name__ == "__main__":
    app(prog_name="dipshape")
