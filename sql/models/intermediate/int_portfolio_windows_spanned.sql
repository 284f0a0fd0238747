-- Each portfolio's evaluation window (our own convention, README "Choices we made"): it
-- starts with the period that begins at the first holdings date; every holdings date
-- covers the periods up to the next one, and the last one covers the usual spacing (the
-- most common gap between holdings dates, the smallest on a tie, 1 with a single date),
-- cut at the calendar's end.
with holdings_dates as (
    select * from int_holdings_dates_spaced
),

calendar as (
    select * from int_calendar_inferred
),

calendar_size as (
    select max(n_periods) as n_periods
    from calendar
),

gap_counts as (
    select
        portfolio_id,
        gap_periods,
        count(*) as n_gaps
    from holdings_dates
    where gap_periods is not null
    group by portfolio_id, gap_periods
),

ranked_gaps as (
    select
        portfolio_id,
        gap_periods,
        row_number() over (
            partition by portfolio_id order by n_gaps desc, gap_periods asc
        ) as gap_rank
    from gap_counts
),

bounds as (
    select
        portfolio_id,
        min(period_index) as first_index,
        max(period_index) as last_holdings_index
    from holdings_dates
    group by portfolio_id
),

windows as (
    select
        b.portfolio_id,
        b.first_index,
        least(b.last_holdings_index + coalesce(g.gap_periods, 1) - 1, c.n_periods - 1)
        as last_index,
        coalesce(g.gap_periods, 1) as spacing
    from bounds as b
    cross join calendar_size as c
    left join ranked_gaps as g
        on b.portfolio_id = g.portfolio_id and g.gap_rank = 1
)

select * from windows
