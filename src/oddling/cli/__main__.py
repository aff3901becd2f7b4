from oddling.cli import main

main()
