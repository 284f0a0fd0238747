-- The evaluation calendar (DESIGN §2), one row per period numbered from 0 in date order.
-- Period t runs from period_end[t-1] to period_end[t]. The first period starts one regular
-- period before the first period_end; the frequency is read off the median gap in days
-- between consecutive dates (the upper median; a single date is read as one month), and a
-- month end steps back to the earlier month end. Rule as in attribution.calendar (common
-- practice, no source). frequency is null when the median gap fits no known frequency.
with index_returns as (
    select * from stg_index_returns
),

period_ends as (
    select distinct period_end
    from index_returns
    where period_end is not null
),

numbered as (
    select
        period_end,
        row_number() over (order by period_end) - 1 as period_index,
        lag(period_end) over (order by period_end) as previous_end
    from period_ends
),

gaps as (
    select date_diff('day', previous_end, period_end) as gap_days
    from numbered
    where previous_end is not null
),

ranked_gaps as (
    select
        gap_days,
        row_number() over (order by gap_days) - 1 as gap_rank,
        count(*) over () as n_gaps
    from gaps
),

median_gap as (
    -- the element at position floor(n / 2) of the sorted gaps, in integer arithmetic
    select max(gap_days) as median_gap_days
    from ranked_gaps
    where 2 * gap_rank between n_gaps - 1 and n_gaps
),

frequency as (
    select
        median_gap_days,
        case
            when median_gap_days is null then 'month'
            when median_gap_days between 1 and 4 then 'day'
            when median_gap_days between 5 and 9 then 'week'
            when median_gap_days between 26 and 35 then 'month'
            when median_gap_days between 85 and 96 then 'quarter'
            when median_gap_days between 175 and 190 then 'half-year'
            when median_gap_days between 360 and 370 then 'year'
        end as frequency
    from median_gap
),

first_end as (
    select
        min(period_end) as first_end,
        cast(min(period_end) + interval 1 day as date) as day_after_first_end
    from period_ends
),

first_start as (
    select
        f.median_gap_days,
        f.frequency,
        case f.frequency
            when 'day' then 252
            when 'week' then 52
            when 'month' then 12
            when 'quarter' then 4
            when 'half-year' then 2
            when 'year' then 1
        end as periods_per_year,
        case
            when f.frequency = 'day' then cast(e.first_end - interval 1 day as date)
            when f.frequency = 'week' then cast(e.first_end - interval 7 day as date)
            -- a month end: the month end 1, 3, 6 or 12 months earlier
            when extract(day from e.day_after_first_end) = 1 and f.frequency = 'month'
                then cast(
                    cast(e.day_after_first_end - interval 1 month as date) - interval 1 day as date
                )
            when extract(day from e.day_after_first_end) = 1 and f.frequency = 'quarter'
                then cast(
                    cast(e.day_after_first_end - interval 3 month as date) - interval 1 day as date
                )
            when extract(day from e.day_after_first_end) = 1 and f.frequency = 'half-year'
                then cast(
                    cast(e.day_after_first_end - interval 6 month as date) - interval 1 day as date
                )
            when extract(day from e.day_after_first_end) = 1 and f.frequency = 'year'
                then cast(
                    cast(e.day_after_first_end - interval 12 month as date) - interval 1 day as date
                )
            -- any other day: the same day that many months earlier, cut to the month's length
            when f.frequency = 'month' then cast(e.first_end - interval 1 month as date)
            when f.frequency = 'quarter' then cast(e.first_end - interval 3 month as date)
            when f.frequency = 'half-year' then cast(e.first_end - interval 6 month as date)
            when f.frequency = 'year' then cast(e.first_end - interval 12 month as date)
        end as first_start
    from frequency as f
    cross join first_end as e
),

calendar as (
    select
        n.period_index,
        coalesce(n.previous_end, s.first_start) as period_start,
        n.period_end,
        s.frequency,
        s.periods_per_year,
        s.median_gap_days,
        count(*) over () as n_periods
    from numbered as n
    cross join first_start as s
)

select * from calendar
