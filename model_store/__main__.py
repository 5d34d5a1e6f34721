import sys

from model_store.cli import main

sys.exit(main())
