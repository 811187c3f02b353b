from .cli import run

# guarded: a helper process started with "spawn" (the audit's synthetic networks) imports this module again
if __name__ == "__main__":
    run()
