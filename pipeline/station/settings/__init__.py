"""Station settings (station.toml) -> Settings: the face the rest of formgate imports them by.

The station's settings are a subpart of the station, one job per module:

- records.py: the records (Settings, InboxSettings, ProfileRule, MailRouting, SmtpConfig)
  and choose_profile;
- check.py: text -> Settings or every located problem (load_settings, check_settings),
  pure; keys and values are checked against schema.py;
- folders.py and mail.py: the rules between keys, for the folders and for [smtp] and [mail];
- files.py: the edges: read_settings reads the file, read_credential_file the SMTP
  password file, check_filesystems stats the folders, init_station writes a new station.

This face names what the station, the command line and the demo use, so that they depend
on what settings are, not on how the checking is cut into modules; the modules inside
import one another directly. Running the station is station.py's job.
"""

from __future__ import annotations

from pipeline.station.settings.check import check_settings as check_settings
from pipeline.station.settings.check import load_settings as load_settings
from pipeline.station.settings.files import SHIPPED_RULES as SHIPPED_RULES
from pipeline.station.settings.files import check_credential_mode as check_credential_mode
from pipeline.station.settings.files import check_filesystems as check_filesystems
from pipeline.station.settings.files import init_station as init_station
from pipeline.station.settings.files import read_credential_file as read_credential_file
from pipeline.station.settings.files import read_settings as read_settings
from pipeline.station.settings.files import smtp_settings as smtp_settings
from pipeline.station.settings.records import InboxSettings as InboxSettings
from pipeline.station.settings.records import MailRouting as MailRouting
from pipeline.station.settings.records import ProfileRule as ProfileRule
from pipeline.station.settings.records import Settings as Settings
from pipeline.station.settings.records import SmtpConfig as SmtpConfig
from pipeline.station.settings.records import channel_classes as channel_classes
from pipeline.station.settings.records import choose_profile as choose_profile
from pipeline.station.settings.schema import render_station_toml as render_station_toml

__all__ = [
    "SHIPPED_RULES",
    "InboxSettings",
    "MailRouting",
    "ProfileRule",
    "Settings",
    "SmtpConfig",
    "channel_classes",
    "check_credential_mode",
    "check_filesystems",
    "check_settings",
    "choose_profile",
    "init_station",
    "load_settings",
    "read_credential_file",
    "read_settings",
    "render_station_toml",
    "smtp_settings",
]
