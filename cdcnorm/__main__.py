from cdcnorm.entry import main

raise SystemExit(main())
