from corpuscle.cli import program

program()
