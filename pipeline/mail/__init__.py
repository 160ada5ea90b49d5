"""Mail: composing letters (failures, holds, digests, alerts) and the SMTP conversation.
May import the core and report; never the station or the demo.
"""
