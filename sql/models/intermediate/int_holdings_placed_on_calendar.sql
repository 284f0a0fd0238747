-- Every holdings row with the period its weights are held over: as_of = period_start of
-- period t gives period_index t; as_of = the calendar's last period_end gives n_periods (a
-- period the calendar does not have yet: checked, never used); any other date gives null
-- (off the calendar). is_known_class says whether index_returns carries the class.
with holdings as (
    select * from stg_holdings
),

calendar as (
    select * from int_calendar_inferred
),

index_returns as (
    select * from stg_index_returns
),

index_classes as (
    select distinct asset_class
    from index_returns
    where asset_class is not null
),

holdings_dates as (
    select
        period_start as holdings_date,
        period_index
    from calendar
    union all
    select
        period_end as holdings_date,
        n_periods as period_index
    from calendar
    where period_index = n_periods - 1
),

placed as (
    select
        h.portfolio_id,
        h.as_of,
        h.asset_class,
        h.weight,
        d.period_index,
        k.asset_class is not null as is_known_class
    from holdings as h
    left join holdings_dates as d
        on h.as_of = d.holdings_date
    left join index_classes as k
        on h.asset_class = k.asset_class
    where h.portfolio_id is not null
)

select * from placed
