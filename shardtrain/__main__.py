import sys

from shardtrain.cli import main

sys.exit(main())
