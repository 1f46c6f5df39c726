"""``python -m leadline.service serve --data-dir DIR --listen HOST:PORT ...``."""

import sys

from leadline.service.server import main

if __name__ == "__main__":
    sys.exit(main())
