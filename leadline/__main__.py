from leadline.jobs.cli import main

main()
