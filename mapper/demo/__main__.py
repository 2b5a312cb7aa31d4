"""``python -m mapper.demo --write FOLDER`` regenerates the sample campaign."""

from mapper.demo.scenario import main

raise SystemExit(main())
