"""``python -m pmap``: the same command line as the ``pmap`` script."""

from pmap.cli import main

if __name__ == "__main__":
    main()
