from .commands.main import console

console()
