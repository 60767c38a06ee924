"""Store each series' frequency under the alias pandas names now ('A' becomes 'YE-DEC').

Aftercast used to store a frequency as it was written, and pandas deprecated some aliases
('A', 'Y', 'Q', 'M', 'H', 'T', 'S', ...) for others that count the same periods; a store holding
them would stop working when pandas removes them. The downgrade writes the month, quarter and
year ends back as 'M', 'Q' and 'Y', the aliases the earlier version counts periods in.

Revision ID: 0011_current_frequencies
Revises: 0001
"""

import re

import sqlalchemy as sa
from alembic import op

from aftercast.periods import check_frequency

revision = "0011_current_frequencies"
down_revision = "0001"
branch_labels = None
depends_on = None

_PERIOD_END = re.compile(r"^(\d*)([MQY])E(-[A-Z]{3})?$")


def _rename(names: dict[str, str]) -> None:
    for old, new in names.items():
        if new != old:
            op.execute(
                sa.text("UPDATE series SET frequency = :new WHERE frequency = :old").bindparams(
                    new=new, old=old
                )
            )


def _stored() -> list[str]:
    rows = op.get_bind().execute(sa.text("SELECT DISTINCT frequency FROM series"))
    return [row[0] for row in rows]


def _current(freq: str) -> str:
    try:
        return check_frequency(freq)
    except ValueError:  # stored before it was checked: left for the user to see
        return freq


def upgrade() -> None:
    _rename({freq: _current(freq) for freq in _stored()})


def downgrade() -> None:
    _rename({freq: _PERIOD_END.sub(r"\1\2\3", freq) for freq in _stored()})
