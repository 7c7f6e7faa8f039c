from corpuscle.cli import main

main()
