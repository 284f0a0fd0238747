-- The holdings dates of each portfolio that passed the row checks, as period indices inside
-- the calendar (a date on the last period_end starts no calendar period and is left out),
-- with the number of periods since the previous holdings date (null for the first).
with holdings as (
    select * from int_holdings_placed_on_calendar
),

calendar as (
    select * from int_calendar_inferred
),

portfolio_errors as (
    select * from int_portfolio_errors_found
),

calendar_size as (
    select max(n_periods) as n_periods
    from calendar
),

failed as (
    select distinct portfolio_id
    from portfolio_errors
),

holdings_dates as (
    select distinct
        h.portfolio_id,
        h.period_index
    from holdings as h
    cross join calendar_size as c
    left join failed as f
        on h.portfolio_id = f.portfolio_id
    where f.portfolio_id is null and h.period_index < c.n_periods
),

spaced as (
    select
        portfolio_id,
        period_index,
        period_index - lag(period_index) over (
            partition by portfolio_id order by period_index
        ) as gap_periods
    from holdings_dates
)

select * from spaced
