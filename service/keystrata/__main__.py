from keystrata.cli.main import main

main()
