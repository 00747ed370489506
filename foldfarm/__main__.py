from foldfarm.cli import main

main()
