"""The long-running daemon: its control socket, the activities it runs, its status, and the client."""
