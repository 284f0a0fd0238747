-- Problems confined to one portfolio's rows (holdings, policy, segment_returns,
-- portfolio_returns of the portfolios that have holdings): each is an `error` that skips
-- the portfolio, with the stable codes of attribution.validate.ISSUE_CODES and the same
-- rules: missing_key, duplicate_key (among rows on the calendar with a known class),
-- nonfinite_value, return_below_minus_100, off_calendar_date, unknown_asset_class,
-- weights_not_summing (|sum - 1| > weight_tolerance per portfolio and date).
with holdings as (
    select * from int_holdings_placed_on_calendar
),

policy_given as (
    select * from stg_policy
),

segment_returns_given as (
    select * from stg_segment_returns
),

portfolio_returns_given as (
    select * from stg_portfolio_returns
),

calendar as (
    select * from int_calendar_inferred
),

index_returns as (
    select * from stg_index_returns
),

run_options as (
    select * from stg_run_options
),

index_classes as (
    select distinct asset_class
    from index_returns
    where asset_class is not null
),

first_start as (
    select min(period_start) as first_start
    from calendar
),

held_portfolios as (
    select distinct portfolio_id
    from holdings
),

policy as (
    select
        p.portfolio_id,
        p.asset_class,
        p.policy_weight,
        p.effective_from,
        k.asset_class is not null as is_known_class
    from policy_given as p
    inner join held_portfolios as h
        on p.portfolio_id = h.portfolio_id
    left join index_classes as k
        on p.asset_class = k.asset_class
),

segment_returns as (
    select
        s.portfolio_id,
        s.period_end,
        s.asset_class,
        s.segment_return,
        c.period_index,
        k.asset_class is not null as is_known_class
    from segment_returns_given as s
    inner join held_portfolios as h
        on s.portfolio_id = h.portfolio_id
    left join calendar as c
        on s.period_end = c.period_end
    left join index_classes as k
        on s.asset_class = k.asset_class
),

portfolio_returns as (
    select
        r.portfolio_id,
        r.period_end,
        r.reported_return,
        c.period_index
    from portfolio_returns_given as r
    inner join held_portfolios as h
        on r.portfolio_id = h.portfolio_id
    left join calendar as c
        on r.period_end = c.period_end
),

-- holdings ---------------------------------------------------------------------------------

holdings_missing_key as (
    select distinct
        portfolio_id,
        cast(null as date) as period_end,
        cast(null as varchar) as asset_class,
        'missing_key' as code,
        'holdings: portfolio ' || portfolio_id || ' has a row with an empty as_of or asset_class.'
        as message
    from holdings
    where as_of is null or asset_class is null
),

holdings_duplicate_key as (
    select
        portfolio_id,
        as_of as period_end,
        asset_class,
        'duplicate_key' as code,
        'holdings: duplicate row for portfolio ' || portfolio_id || ' on ' || cast(as_of as varchar)
        || ' class ' || asset_class
        || '; each (portfolio_id, as_of, asset_class) must appear once.' as message
    from holdings
    where period_index is not null and is_known_class
    group by portfolio_id, as_of, asset_class
    having count(*) > 1
),

holdings_nonfinite as (
    select distinct
        portfolio_id,
        as_of as period_end,
        asset_class,
        'nonfinite_value' as code,
        'holdings: portfolio ' || portfolio_id || ' on '
        || coalesce(cast(as_of as varchar), 'an empty date') || ' class '
        || coalesce(asset_class, 'empty') || ': column ''weight'' is '
        || case when weight is null then 'empty' else 'NaN or infinite' end
        || '; expected a finite number.' as message
    from holdings
    where weight is null or not weight - weight = 0
),

holdings_off_calendar as (
    select distinct
        h.portfolio_id,
        h.as_of as period_end,
        cast(null as varchar) as asset_class,
        'off_calendar_date' as code,
        'holdings: portfolio ' || h.portfolio_id || ': as_of ' || cast(h.as_of as varchar)
        || ' is not on the calendar of index_returns; expected a period_end or the first '
        || 'period''s start ' || cast(f.first_start as varchar) || '.' as message
    from holdings as h
    cross join first_start as f
    where h.as_of is not null and h.period_index is null
),

holdings_unknown_class as (
    select distinct
        portfolio_id,
        cast(null as date) as period_end,
        asset_class,
        'unknown_asset_class' as code,
        'holdings: portfolio ' || portfolio_id || ': asset_class ' || asset_class
        || ' is not in index_returns.' as message
    from holdings
    where asset_class is not null and not is_known_class
),

holdings_sums as (
    select
        portfolio_id,
        as_of,
        sum(weight) as total_weight
    from holdings
    where as_of is not null and weight - weight = 0
    group by portfolio_id, as_of
),

holdings_not_summing as (
    select
        s.portfolio_id,
        s.as_of as period_end,
        cast(null as varchar) as asset_class,
        'weights_not_summing' as code,
        'holdings: portfolio ' || s.portfolio_id || ' on ' || cast(s.as_of as varchar)
        || ': weights sum to '
        || case
            when abs(s.total_weight) < 1e18
                then cast(cast(s.total_weight as decimal(38, 8)) as varchar)
            else 'out of range'
        end
        || '; expected 1 within '
        || case
            when abs(o.weight_tolerance) < 1e18
                then cast(cast(o.weight_tolerance as decimal(38, 10)) as varchar)
            else 'out of range'
        end
        || '.' as message
    from holdings_sums as s
    cross join run_options as o
    where abs(s.total_weight - 1) > o.weight_tolerance
),

-- policy -----------------------------------------------------------------------------------

policy_missing_key as (
    select distinct
        portfolio_id,
        cast(null as date) as period_end,
        cast(null as varchar) as asset_class,
        'missing_key' as code,
        'policy: portfolio ' || portfolio_id
        || ' has a row with an empty effective_from or asset_class.' as message
    from policy
    where effective_from is null or asset_class is null
),

policy_duplicate_key as (
    select
        portfolio_id,
        cast(null as date) as period_end,
        asset_class,
        'duplicate_key' as code,
        'policy: duplicate row for portfolio ' || portfolio_id || ' on '
        || cast(effective_from as varchar) || ' class ' || asset_class
        || '; each (portfolio_id, effective_from, asset_class) must appear once.' as message
    from policy
    where effective_from is not null and asset_class is not null
    group by portfolio_id, effective_from, asset_class
    having count(*) > 1
),

policy_nonfinite as (
    select distinct
        portfolio_id,
        cast(null as date) as period_end,
        asset_class,
        'nonfinite_value' as code,
        'policy: portfolio ' || portfolio_id || ' on '
        || coalesce(cast(effective_from as varchar), 'an empty date') || ' class '
        || coalesce(asset_class, 'empty') || ': column ''weight'' is '
        || case when policy_weight is null then 'empty' else 'NaN or infinite' end
        || '; expected a finite number.' as message
    from policy
    where policy_weight is null or not policy_weight - policy_weight = 0
),

policy_unknown_class as (
    select distinct
        portfolio_id,
        cast(null as date) as period_end,
        asset_class,
        'unknown_asset_class' as code,
        'policy: portfolio ' || portfolio_id || ': asset_class ' || asset_class
        || ' is not in index_returns.' as message
    from policy
    where asset_class is not null and not is_known_class
),

policy_sums as (
    select
        portfolio_id,
        effective_from,
        sum(policy_weight) as total_weight
    from policy
    where effective_from is not null and policy_weight - policy_weight = 0
    group by portfolio_id, effective_from
),

policy_not_summing as (
    select
        s.portfolio_id,
        cast(null as date) as period_end,
        cast(null as varchar) as asset_class,
        'weights_not_summing' as code,
        'policy: portfolio ' || s.portfolio_id || ' on ' || cast(s.effective_from as varchar)
        || ': weights sum to '
        || case
            when abs(s.total_weight) < 1e18
                then cast(cast(s.total_weight as decimal(38, 8)) as varchar)
            else 'out of range'
        end
        || '; expected 1 within '
        || case
            when abs(o.weight_tolerance) < 1e18
                then cast(cast(o.weight_tolerance as decimal(38, 10)) as varchar)
            else 'out of range'
        end
        || '.' as message
    from policy_sums as s
    cross join run_options as o
    where abs(s.total_weight - 1) > o.weight_tolerance
),

-- segment_returns --------------------------------------------------------------------------

segment_missing_key as (
    select distinct
        portfolio_id,
        cast(null as date) as period_end,
        cast(null as varchar) as asset_class,
        'missing_key' as code,
        'segment_returns: portfolio ' || portfolio_id
        || ' has a row with an empty period_end or asset_class.' as message
    from segment_returns
    where period_end is null or asset_class is null
),

segment_duplicate_key as (
    select
        portfolio_id,
        period_end,
        asset_class,
        'duplicate_key' as code,
        'segment_returns: duplicate row for portfolio ' || portfolio_id || ' on '
        || cast(period_end as varchar) || ' class ' || asset_class
        || '; each (portfolio_id, period_end, asset_class) must appear once.' as message
    from segment_returns
    where period_index is not null and is_known_class
    group by portfolio_id, period_end, asset_class
    having count(*) > 1
),

segment_nonfinite as (
    select distinct
        portfolio_id,
        period_end,
        asset_class,
        'nonfinite_value' as code,
        'segment_returns: portfolio ' || portfolio_id || ' on '
        || coalesce(cast(period_end as varchar), 'an empty date') || ' class '
        || coalesce(asset_class, 'empty') || ': column ''return'' is '
        || case when segment_return is null then 'empty' else 'NaN or infinite' end
        || '; expected a finite number.' as message
    from segment_returns
    where segment_return is null or not segment_return - segment_return = 0
),

segment_too_low as (
    select distinct
        portfolio_id,
        period_end,
        asset_class,
        'return_below_minus_100' as code,
        'segment_returns: portfolio ' || portfolio_id || ' on '
        || coalesce(cast(period_end as varchar), 'an empty date') || ' class '
        || coalesce(asset_class, 'empty') || ': return '
        || case
            when abs(segment_return) < 1e18
                then cast(cast(segment_return as decimal(38, 8)) as varchar)
            else 'out of range'
        end
        || ' is -100 % or less; expected a return above -1.' as message
    from segment_returns
    where segment_return <= -1
),

segment_off_calendar as (
    select distinct
        portfolio_id,
        period_end,
        cast(null as varchar) as asset_class,
        'off_calendar_date' as code,
        'segment_returns: portfolio ' || portfolio_id || ': period_end '
        || cast(period_end as varchar)
        || ' is not on the calendar of index_returns; expected a period_end.' as message
    from segment_returns
    where period_end is not null and period_index is null
),

segment_unknown_class as (
    select distinct
        portfolio_id,
        cast(null as date) as period_end,
        asset_class,
        'unknown_asset_class' as code,
        'segment_returns: portfolio ' || portfolio_id || ': asset_class ' || asset_class
        || ' is not in index_returns.' as message
    from segment_returns
    where asset_class is not null and not is_known_class
),

-- portfolio_returns ------------------------------------------------------------------------

reported_missing_key as (
    select distinct
        portfolio_id,
        cast(null as date) as period_end,
        cast(null as varchar) as asset_class,
        'missing_key' as code,
        'portfolio_returns: portfolio ' || portfolio_id || ' has a row with an empty period_end.'
        as message
    from portfolio_returns
    where period_end is null
),

reported_duplicate_key as (
    select
        portfolio_id,
        period_end,
        cast(null as varchar) as asset_class,
        'duplicate_key' as code,
        'portfolio_returns: duplicate row for portfolio ' || portfolio_id || ' on '
        || cast(period_end as varchar) || '; each (portfolio_id, period_end) must appear once.'
        as message
    from portfolio_returns
    where period_index is not null
    group by portfolio_id, period_end
    having count(*) > 1
),

reported_nonfinite as (
    select distinct
        portfolio_id,
        period_end,
        cast(null as varchar) as asset_class,
        'nonfinite_value' as code,
        'portfolio_returns: portfolio ' || portfolio_id || ' on '
        || coalesce(cast(period_end as varchar), 'an empty date') || ': column ''return'' is '
        || case when reported_return is null then 'empty' else 'NaN or infinite' end
        || '; expected a finite number.' as message
    from portfolio_returns
    where reported_return is null or not reported_return - reported_return = 0
),

reported_too_low as (
    select distinct
        portfolio_id,
        period_end,
        cast(null as varchar) as asset_class,
        'return_below_minus_100' as code,
        'portfolio_returns: portfolio ' || portfolio_id || ' on '
        || coalesce(cast(period_end as varchar), 'an empty date') || ': return '
        || case
            when abs(reported_return) < 1e18
                then cast(cast(reported_return as decimal(38, 8)) as varchar)
            else 'out of range'
        end
        || ' is -100 % or less; expected a return above -1.'
        as message
    from portfolio_returns
    where reported_return <= -1
),

reported_off_calendar as (
    select distinct
        portfolio_id,
        period_end,
        cast(null as varchar) as asset_class,
        'off_calendar_date' as code,
        'portfolio_returns: portfolio ' || portfolio_id || ': period_end '
        || cast(period_end as varchar)
        || ' is not on the calendar of index_returns; expected a period_end.' as message
    from portfolio_returns
    where period_end is not null and period_index is null
),

found as (
    select portfolio_id, period_end, asset_class, code, message from holdings_missing_key
    union all
    select portfolio_id, period_end, asset_class, code, message from holdings_duplicate_key
    union all
    select portfolio_id, period_end, asset_class, code, message from holdings_nonfinite
    union all
    select portfolio_id, period_end, asset_class, code, message from holdings_off_calendar
    union all
    select portfolio_id, period_end, asset_class, code, message from holdings_unknown_class
    union all
    select portfolio_id, period_end, asset_class, code, message from holdings_not_summing
    union all
    select portfolio_id, period_end, asset_class, code, message from policy_missing_key
    union all
    select portfolio_id, period_end, asset_class, code, message from policy_duplicate_key
    union all
    select portfolio_id, period_end, asset_class, code, message from policy_nonfinite
    union all
    select portfolio_id, period_end, asset_class, code, message from policy_unknown_class
    union all
    select portfolio_id, period_end, asset_class, code, message from policy_not_summing
    union all
    select portfolio_id, period_end, asset_class, code, message from segment_missing_key
    union all
    select portfolio_id, period_end, asset_class, code, message from segment_duplicate_key
    union all
    select portfolio_id, period_end, asset_class, code, message from segment_nonfinite
    union all
    select portfolio_id, period_end, asset_class, code, message from segment_too_low
    union all
    select portfolio_id, period_end, asset_class, code, message from segment_off_calendar
    union all
    select portfolio_id, period_end, asset_class, code, message from segment_unknown_class
    union all
    select portfolio_id, period_end, asset_class, code, message from reported_missing_key
    union all
    select portfolio_id, period_end, asset_class, code, message from reported_duplicate_key
    union all
    select portfolio_id, period_end, asset_class, code, message from reported_nonfinite
    union all
    select portfolio_id, period_end, asset_class, code, message from reported_too_low
    union all
    select portfolio_id, period_end, asset_class, code, message from reported_off_calendar
),

portfolio_errors as (
    select
        portfolio_id,
        period_end,
        asset_class,
        'error' as severity,
        code,
        message
    from found
)

select * from portfolio_errors
